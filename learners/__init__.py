"""Online binary classifiers that know their own worst-case mistake ceilings.

Pure algorithms: the standard library and numpy only. The interface the service uses::

    learner = learners.make("winnow", features=10**8, relevant=5)
    learner.predict(item)          # 0 or 1
    learner.learn(item, label)     # True when it updated
    learner.updates, learner.mistakes, learner.contradicted
    learner.ceiling()              # value, formula, assumption, source, counts, implied
    learner.ceiling_value()        # ceiling().value alone, O(1): for a read after every label
    learner.counts                 # "updates" or "mistakes": what the ceiling bounds
    state = learner.to_state()     # plain JSON-safe data, versioned
    learners.from_state(state)     # continues exactly where the original was
"""

from learners.base import Ceiling, Learner, standing
from learners.errors import FeatureError, LabelError, LearnerError, ParameterError, StateError
from learners.features import Encoded, FeatureSpace
from learners.registry import KINDS, describe, from_state, make

__all__ = [
    "KINDS",
    "Ceiling",
    "Encoded",
    "FeatureError",
    "FeatureSpace",
    "LabelError",
    "Learner",
    "LearnerError",
    "ParameterError",
    "StateError",
    "describe",
    "from_state",
    "make",
    "standing",
]
