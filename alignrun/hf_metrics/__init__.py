"""`evaluate` metric scripts wrapping alignrun.metrics; load one offline with `evaluate.load(metric_path(name))`.

Each folder holds `<name>.py` with one `evaluate.Metric` subclass that calls the function of the same
name in alignrun.metrics (no second implementation).
"""

from pathlib import Path

NAMES = ("expected_max_harm", "harm_probability", "harm_rate", "distinct_n")


def metric_path(name: str) -> str:
    """Local folder of the named metric script, the form `evaluate.load` accepts without a network."""
    if name not in NAMES:
        raise ValueError(f"unknown metric {name!r}; expected one of {', '.join(NAMES)}")
    return str(Path(__file__).parent / name)
