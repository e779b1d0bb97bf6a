"""The demo scenario: Quillhaven Lockers, an invented parcel-locker network, and its generator."""
