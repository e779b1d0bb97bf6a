"""deploy/prometheus/: the alert rules, their unit tests and the scrape config, checked by promtool.

promtool (shipped with Prometheus, Debian package ``prometheus``) is the outside reference: it
parses the rules and the config with Prometheus's own code and runs the rule unit tests in
alerts_test.yml on its query engine. The rules are also checked against the real service: the
series and labels they use are the ones a scrape of it yields, and the rules fire, through
promtool, exactly as expected on scrapes of a service driven into known states (contradicted,
exceeded; service_scrape.py), with and without the stream label.
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import typing
from pathlib import Path
from typing import Any

import pytest
import yaml

from learners.base import Standing
from tests.deploy.service_scrape import WINNOW_ROUNDS, Scrape, scrape_service
from tests.deploy.tools import DEPLOY

PROM = DEPLOY / "prometheus"
ALERTS = PROM / "alerts.yml"
ALERTS_TEST = PROM / "alerts_test.yml"
SCRAPE = PROM / "scrape.yml"

# Labels Prometheus adds to every scraped series (common practice: job and instance; `shard` is
# the target label set in scrape.yml).
TARGET_LABELS = frozenset({"job", "instance", "shard"})
# Series Prometheus makes itself for each target (Prometheus docs, "Jobs and instances").
PROMETHEUS_SERIES: dict[str, frozenset[str]] = {"up": frozenset()}

PROMQL_WORDS = frozenset(
    {"and", "or", "unless", "by", "without", "on", "ignoring", "group_left", "group_right"}
    | {"offset", "bool", "inf", "nan"}
)


@pytest.fixture(scope="module")
def scraped(tmp_path_factory: pytest.TempPathFactory) -> Scrape:
    return scrape_service(tmp_path_factory.mktemp("ledger"))


@pytest.fixture(scope="module")
def scraped_without_stream(tmp_path_factory: pytest.TempPathFactory) -> Scrape:
    return scrape_service(tmp_path_factory.mktemp("ledger-flat"), stream_label=False)


def run(*args: str | Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(a) for a in args], capture_output=True, text=True, timeout=60, check=False
    )


def rule_exprs() -> list[tuple[str, str]]:
    doc = yaml.safe_load(ALERTS.read_text())
    return [
        (rule.get("alert") or rule["record"], rule["expr"])
        for group in doc["groups"]
        for rule in group["rules"]
    ]


def selectors(expr: str) -> list[tuple[str, dict[str, str]]]:
    """(metric name, {label: matched value}) for every series selector in a PromQL expression."""
    found: list[tuple[str, dict[str, str]]] = []
    # Grouping and matching clauses hold label names, not metric names.
    text = re.sub(r"\b(by|without|on|ignoring|group_left|group_right)\s*\([^)]*\)", " ", expr)
    text = re.sub(r"\[[^\]]*\]", " ", text)  # range and subquery durations
    pattern = re.compile(r"(?<![\w:.])([a-zA-Z_:][a-zA-Z0-9_:]*)\s*(\{[^}]*\})?")
    for match in pattern.finditer(text):
        name, braces = match.group(1), match.group(2)
        rest = text[match.end() :]
        if name in PROMQL_WORDS or (braces is None and rest.lstrip().startswith("(")):
            continue  # a keyword or a function call
        matchers = dict(re.findall(r'([a-zA-Z_]\w*)\s*(?:=~|!~|!=|=)\s*"([^"]*)"', braces or ""))
        found.append((name, matchers))
    return found


def test_selector_parser_reads_a_known_expression() -> None:
    # Guards the parser the next test relies on: functions, keywords, durations and grouping
    # clauses are not metric names.
    expr = (
        'sum by (job, stream) (rate(a_total{state=~"x|y"}[1h])) / ignoring (state) '
        '(b{stream!=""} > 0) unless on (job) up offset 30m'
    )
    assert selectors(expr) == [("a_total", {"state": "x|y"}), ("b", {"stream": ""}), ("up", {})]


def test_rules_use_only_series_and_labels_the_service_exposes(scraped: Scrape) -> None:
    series = {name: frozenset(labels) for name, labels in scraped.series().items()}
    series |= PROMETHEUS_SERIES
    used: set[str] = set()
    for alert, expr in rule_exprs():
        for name, matchers in selectors(expr):
            used.add(name)
            assert name in series, f"{alert} uses {name}, which no scrape of the service yields"
            unknown = set(matchers) - series[name] - TARGET_LABELS
            assert not unknown, f"{alert} matches labels {unknown} that {name} does not carry"
    # The families the ceiling and label rules are about are all watched.
    assert {
        "mistake_ledger_ceiling_count",
        "mistake_ledger_update_ceiling",
        "mistake_ledger_learner_state",
        "mistake_ledger_predictions_expired_total",
        "mistake_ledger_predictions_total",
    } <= used


def test_state_values_in_rules_are_learner_states() -> None:
    # The `state` label carries a learner's standing; learners.base.Standing lists them.
    states = set(typing.get_args(Standing))
    seen: set[str] = set()
    for alert, expr in rule_exprs():
        for _name, matchers in selectors(expr):
            if "state" in matchers:
                values = set(matchers["state"].split("|"))
                assert values <= states, f"{alert} matches states {values - states}"
                seen |= values
    assert {"exceeded", "contradicted", "near"} <= seen


def test_alerts_follow_naming_and_carry_what_on_call_needs() -> None:
    # Common practice: CamelCase alert names, a severity label, summary and description.
    doc = yaml.safe_load(ALERTS.read_text())
    rules = [rule for group in doc["groups"] for rule in group["rules"]]
    assert len(rules) >= 5
    for rule in rules:
        assert re.fullmatch(r"MistakeLedger[A-Z][A-Za-z]+", rule["alert"]), rule["alert"]
        assert rule["labels"]["severity"] in {"critical", "warning"}, rule["alert"]
        assert {"summary", "description", "runbook"} <= set(rule["annotations"]), rule["alert"]


def test_promtool_check_rules(promtool: str) -> None:
    result = run(promtool, "check", "rules", ALERTS)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "SUCCESS" in result.stdout


def test_promtool_rule_unit_tests(promtool: str) -> None:
    result = run(promtool, "test", "rules", ALERTS_TEST)
    assert result.returncode == 0, result.stdout + result.stderr


def test_every_alert_has_unit_tests_that_fire_and_stay_silent() -> None:
    doc = yaml.safe_load(ALERTS_TEST.read_text())
    alerts = {name for name, _ in rule_exprs()}
    fired: set[str] = set()
    silent: set[str] = set()
    for case in doc["tests"]:
        for check in case.get("alert_rule_test", []):
            (fired if check.get("exp_alerts") else silent).add(check["alertname"])
    assert alerts == fired, f"never seen firing in a test: {alerts - fired}"
    assert alerts == silent, f"never seen silent in a test: {alerts - silent}"


def test_promtool_check_config_with_rules(promtool: str) -> None:
    # scrape.yml is a whole Prometheus config; checking it also checks the rule file it loads.
    result = run(promtool, "check", "config", SCRAPE)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "1 rule files found" in result.stdout + result.stderr


def test_commented_metrics_token_option_is_valid_once_enabled(
    promtool: str, tmp_path: Path
) -> None:
    # Uncomment the authorization block the way an operator would, point it at a token file.
    token = tmp_path / "metrics.token"
    token.write_text("a-metrics-token-of-some-length\n")
    text = SCRAPE.read_text()
    enabled = re.sub(
        r"(?m)^(\s*)# (authorization:|  type: Bearer|  credentials_file: .*)$", r"\1\2", text
    )
    enabled = enabled.replace("/etc/prometheus/mistake-ledger-metrics.token", str(token))
    assert "\n    authorization:\n      type: Bearer\n" in enabled
    (tmp_path / "scrape.yml").write_text(enabled)
    shutil.copy(ALERTS, tmp_path / "alerts.yml")
    config = yaml.safe_load(enabled)
    assert config["scrape_configs"][0]["authorization"]["credentials_file"] == str(token)
    result = run(promtool, "check", "config", tmp_path / "scrape.yml")
    assert result.returncode == 0, result.stdout + result.stderr


def test_scrape_targets_are_loopback_and_the_alerted_job() -> None:
    config = yaml.safe_load(SCRAPE.read_text())
    (job,) = config["scrape_configs"]
    # alerts.yml's shard-down rule selects the job by name.
    assert f'up{{job="{job["job_name"]}"}}' in ALERTS.read_text()
    targets = [t for group in job["static_configs"] for t in group["targets"]]
    assert len(targets) >= 2
    assert all(t.startswith("127.0.0.1:") for t in targets)
    assert config["rule_files"] == ["alerts.yml"]


EXCEED = '(mistake_ledger_ceiling_count{stream!=""} > mistake_ledger_update_ceiling)'


@pytest.mark.parametrize(
    "new",
    [
        # A sum over shards would add up copies of the same learner: the shard test must catch it.
        '(sum without (instance) (mistake_ledger_ceiling_count{stream!=""})'
        " > max without (instance) (mistake_ledger_update_ceiling))",
        # Equal to the ceiling is within it.
        '(mistake_ledger_ceiling_count{stream!=""} >= mistake_ledger_update_ceiling)',
        # A missing ceiling must not turn into 0.
        '(mistake_ledger_ceiling_count{stream!=""}'
        " > (mistake_ledger_update_ceiling or 0 * mistake_ledger_ceiling_count))",
        # Without the stream label, sums over streams are not comparable.
        "(mistake_ledger_ceiling_count > mistake_ledger_update_ceiling)",
    ],
    ids=["summed-shards", "equal-fires", "absent-ceiling-as-zero", "sums-without-stream"],
)
def test_unit_tests_reject_wrong_exceed_rules(promtool: str, tmp_path: Path, new: str) -> None:
    # The unit tests are only worth something if a plausible wrong rule fails them.
    text = ALERTS.read_text()
    assert EXCEED in text
    (tmp_path / "alerts.yml").write_text(text.replace(EXCEED, new))
    shutil.copy(ALERTS_TEST, tmp_path / "alerts_test.yml")
    result = run(promtool, "test", "rules", tmp_path / "alerts_test.yml")
    assert result.returncode != 0
    assert "MistakeLedgerLearnerExceededCeiling" in result.stdout + result.stderr


# ------------------------------------------------------------- against the real service


def learner(scrape: Scrape, stream: str, name: str) -> dict[str, Any]:
    (found,) = [x for x in scrape.ledgers[stream]["learners"] if x["name"] == name]
    return found


def test_service_reaches_the_states_the_rules_are_tested_on(scraped: Scrape) -> None:
    # Winnow2, alpha 2, theta = n: ceiling 2 + 3 k (1 + log2 n) (Littlestone 1988; THEORY.md),
    # k = 1, n = 2: 8. Every label contradicted its answer: WINNOW_ROUNDS mistakes.
    winnow = learner(scraped, "parcels-east", "winnow")
    assert winnow["ceiling"]["value"] == pytest.approx(2 + 3 * 1 * (1 + math.log2(2)))
    assert winnow["updates"] == WINNOW_ROUNDS > winnow["ceiling"]["value"]
    assert winnow["state"] == "exceeded"
    # A false positive of elimination is direct proof (THEORY.md, Valiant 1984).
    assert learner(scraped, "lockers-north", "elim")["state"] == "contradicted"


def test_a_learner_without_ceiling_has_no_ceiling_series(scraped: Scrape) -> None:
    # The exceed rule relies on this: no series (or a non-finite value) means nothing to match.
    perc = learner(scraped, "lockers-north", "perc")
    assert perc["ceiling"]["value"] is None
    assert scraped.values("mistake_ledger_ceiling_count", learner="perc") != []
    ceilings = scraped.values("mistake_ledger_update_ceiling", learner="perc")
    assert all(not math.isfinite(v) for v in ceilings)
    assert scraped.values("mistake_ledger_update_ceiling", learner="elim") == [2.0]


def _series_line(name: str, labels: dict[str, str]) -> str:
    inner = ",".join(f'{k}="{v}"' for k, v in sorted(labels.items()))
    return f"{name}{{{inner}}}"


def _number(value: float) -> str:
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "Inf" if value > 0 else "-Inf"
    return repr(value)


@pytest.mark.parametrize("stream_label", [True, False], ids=["stream-label", "no-stream-label"])
def test_rules_fire_as_expected_on_a_real_scrape(
    promtool: str,
    tmp_path: Path,
    scraped: Scrape,
    scraped_without_stream: Scrape,
    stream_label: bool,
) -> None:
    # The scrape is held constant for 40 minutes (one sample a minute) on one shard; the alerts
    # firing at 30m must be exactly: elim contradicted and winnow past its ceiling. perc (no
    # ceiling, within) and everything else stays silent.
    scrape = scraped if stream_label else scraped_without_stream
    target = {"job": "mistake-ledger", "instance": "127.0.0.1:8000"}
    series = [
        {
            "series": _series_line(s.name, {**s.labels, **target}),
            "values": f"{_number(s.value)}+0x40",
        }
        for s in scrape.samples
    ]
    series.append({"series": _series_line("up", target), "values": "1+0x40"})

    def alert(name: str, severity: str, stream: str, learner: str, **extra: str) -> dict[str, Any]:
        labels = {"alertname": name, "alertstate": "firing", "severity": severity, **target}
        labels |= {"learner": learner, **extra}
        if stream_label:
            labels["stream"] = stream
        return {"labels": _series_line("ALERTS", labels), "value": 1}

    expected = [
        alert(
            "MistakeLedgerLearnerContradicted",
            "critical",
            "lockers-north",
            "elim",
            state="contradicted",
        ),
        alert("MistakeLedgerLearnerExceededCeiling", "critical", "parcels-east", "winnow"),
    ]
    case = {
        "rule_files": [str(ALERTS)],
        "evaluation_interval": "1m",
        "tests": [
            {
                "interval": "1m",
                "input_series": series,
                "promql_expr_test": [
                    {
                        "expr": 'ALERTS{alertstate="firing"}',
                        "eval_time": "30m",
                        "exp_samples": expected,
                    }
                ],
            }
        ],
    }
    (tmp_path / "real_scrape_test.yml").write_text(yaml.safe_dump(case, sort_keys=False))
    result = run(promtool, "test", "rules", tmp_path / "real_scrape_test.yml")
    assert result.returncode == 0, result.stdout + result.stderr


def test_cardinality_in_the_readme_matches_a_scrape(scraped: Scrape) -> None:
    # deploy/README.md counts series per learner and per stream; parcels-east has one learner
    # with a claimed ceiling (so both ceiling gauges are present).
    readme = (DEPLOY / "README.md").read_text()
    per_learner = [
        s
        for s in scraped.samples
        if s.labels.get("stream") == "parcels-east" and "learner" in s.labels
    ]
    per_stream = [
        s
        for s in scraped.samples
        if s.labels.get("stream") == "parcels-east" and "learner" not in s.labels
    ]
    assert f"per learner, {len(per_learner)} series" in readme
    assert f"per stream, {len(per_stream)} series" in readme
