"""Parameter specs of a sweep: ``NAME=SPEC`` parsing, name checks, scenario overrides.

``NAME`` is a dotted key of a scenario: ``agent.<option>`` (a key of the agent's options) or
``env_options.<keyword>`` (a keyword of the env's constructor). ``SPEC`` is one of

``log:LOW..HIGH:COUNT``
    ``COUNT`` values spaced evenly on a log scale from ``LOW`` to ``HIGH`` (both > 0), e.g.
    ``agent.camera_precision=log:0.01..100:5`` -> 0.01, 0.1, 1, 10, 100.
``lin:LOW..HIGH:COUNT``
    ``COUNT`` values spaced evenly from ``LOW`` to ``HIGH``, e.g.
    ``agent.attractor_gain_1_s=lin:1..8:8`` -> 1, 2, ..., 8. When both ends are written as whole
    numbers and every value is whole, the values are integers.
``V1,V2,...``
    a list of values (numbers, ``true``/``false`` or words), e.g. ``agent.order=1,2,3``;
    a single value is a list of one.

Random and adaptive searches draw from the interval ``[LOW, HIGH]`` of a range (log-uniform for
``log:``, uniform for ``lin:``; whole numbers for an integer range) and pick among the values of
a list; ``COUNT`` matters only to the grid.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from blanket.errors import ConfigError, did_you_mean

__all__ = [
    "ParameterSpec",
    "parse_spec",
    "parse_vary",
    "valid_names",
    "check_names",
    "apply_overrides",
    "grid_size",
    "TABLES",
]

TABLES = ("agent", "env_options")

_RANGE = re.compile(r"^(lin|log):([^:]*)\.\.([^:]*):([^:]*)$")


@dataclass(frozen=True)
class ParameterSpec:
    """One varied scenario key and the values a sweep tries.

    Attributes
    ----------
    name : str
        Dotted scenario key, e.g. ``agent.camera_precision``.
    scale : str
        ``"log"`` or ``"lin"`` for a range, ``"list"`` for listed values.
    values : tuple
        The grid values, in order.
    low, high : float or None
        Ends of a range (None for a list).
    integer : bool
        True when a range holds whole numbers only.
    text : str
        The spec as written (for messages and the sweep record).
    """

    name: str
    scale: str
    values: tuple[Any, ...]
    low: float | None = None
    high: float | None = None
    integer: bool = False
    text: str = ""

    @property
    def numeric(self) -> bool:
        """True when every value is a number (so plots can use a numeric axis)."""
        return all(isinstance(v, int | float) and not isinstance(v, bool) for v in self.values)

    def sample(self, rng: np.random.Generator) -> Any:
        """One random value: log-uniform / uniform on a range, a uniform pick from a list."""
        if self.scale == "list":
            return self.values[int(rng.integers(len(self.values)))]
        assert self.low is not None and self.high is not None
        if self.integer:
            if self.scale == "log":
                v = math.exp(rng.uniform(math.log(self.low), math.log(self.high + 1)))
                return int(min(max(math.floor(v), self.low), self.high))
            return int(rng.integers(int(self.low), int(self.high) + 1))
        if self.scale == "log":
            return float(math.exp(rng.uniform(math.log(self.low), math.log(self.high))))
        return float(rng.uniform(self.low, self.high))

    def to_dict(self) -> dict[str, Any]:
        """A JSON-friendly record of the spec."""
        return {
            "name": self.name,
            "scale": self.scale,
            "values": list(self.values),
            "low": self.low,
            "high": self.high,
            "integer": self.integer,
            "text": self.text,
        }


def _number(text: str, name: str, what: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise ConfigError(f"--vary {name}: {what} must be a number, got {text!r}") from None
    if not math.isfinite(v):
        raise ConfigError(f"--vary {name}: {what} must be a finite number, got {text!r}")
    return v


def _is_whole(text: str) -> bool:
    return re.fullmatch(r"[+-]?\d+", text.strip()) is not None


def _scalar(text: str) -> Any:
    t = text.strip()
    low = t.lower()
    if low in ("true", "false"):
        return low == "true"
    if _is_whole(t):
        return int(t)
    try:
        v = float(t)
    except ValueError:
        return t
    return v if math.isfinite(v) else t


def parse_spec(name: str, spec: str) -> ParameterSpec:
    """Parse the ``SPEC`` part of ``--vary NAME=SPEC`` (syntax in the module docstring).

    Raises
    ------
    ConfigError
        Empty or malformed spec, ``LOW > HIGH``, a non-positive end on a log scale, a count
        below 1, or a repeated list value.
    """
    text = spec.strip()
    if not text:
        raise ConfigError(
            f"--vary {name}: empty spec; write log:LOW..HIGH:COUNT, lin:LOW..HIGH:COUNT "
            "or V1,V2,..."
        )
    m = _RANGE.match(text)
    if m is None and re.match(r"^(lin|log):", text):
        raise ConfigError(
            f"--vary {name}: malformed range {text!r}; write "
            f"{text[:3]}:LOW..HIGH:COUNT, e.g. {text[:3]}:0.1..10:5"
        )
    if m is not None:
        scale, lo_t, hi_t, n_t = m.groups()
        lo = _number(lo_t, name, "LOW")
        hi = _number(hi_t, name, "HIGH")
        if not _is_whole(n_t) or int(n_t) < 1:
            raise ConfigError(f"--vary {name}: COUNT must be a whole number >= 1, got {n_t!r}")
        n = int(n_t)
        if lo > hi:
            raise ConfigError(f"--vary {name}: LOW must be <= HIGH, got {lo_t}..{hi_t}")
        if scale == "log" and lo <= 0:
            raise ConfigError(f"--vary {name}: log scale needs LOW > 0, got {lo_t}")
        if n == 1 and lo != hi:
            raise ConfigError(f"--vary {name}: COUNT 1 needs LOW == HIGH, got {lo_t}..{hi_t}")
        if scale == "log":
            grid = np.geomspace(lo, hi, n) if n > 1 else np.array([lo])
        else:
            grid = np.linspace(lo, hi, n)
        integer = (
            _is_whole(lo_t)
            and _is_whole(hi_t)
            and bool(np.all(np.abs(grid - np.round(grid)) < 1e-9))
        )
        if integer:
            values: tuple[Any, ...] = tuple(int(round(v)) for v in grid)
        else:
            # round away float noise (geomspace(0.01, 100, 5)[1] is 0.09999999999999999)
            values = tuple(float(f"{v:.12g}") for v in grid)
        if len(set(values)) != len(values):
            raise ConfigError(f"--vary {name}: {text!r} repeats values; lower COUNT")
        return ParameterSpec(name, scale, values, lo, hi, integer, text)
    parts = [p.strip() for p in text.split(",")]
    if any(not p for p in parts):
        raise ConfigError(f"--vary {name}: empty item in list {text!r}")
    values = tuple(_scalar(p) for p in parts)
    if len(set(map(repr, values))) != len(values):
        raise ConfigError(f"--vary {name}: list {text!r} repeats a value")
    return ParameterSpec(name, "list", values, text=text)


def parse_vary(text: str) -> ParameterSpec:
    """Parse one ``NAME=SPEC`` argument of ``--vary`` (names are checked by :func:`check_names`)."""
    name, sep, spec = text.partition("=")
    name = name.strip()
    if not sep or not name:
        raise ConfigError(
            f"--vary must be NAME=SPEC, e.g. agent.camera_precision=log:0.01..100:5, got {text!r}"
        )
    if name.count(".") != 1 or not all(name.split(".")):
        raise ConfigError(
            f"--vary name must be TABLE.KEY with TABLE one of {', '.join(TABLES)}, got {name!r}"
        )
    return parse_spec(name, spec)


def _agent_option_names(env_id: str, agent: Mapping[str, Any]) -> list[str] | None:
    """Keys of the options of the agent a scenario builds (None when its class is the user's)."""
    if "class" in agent:
        return None
    import gymnasium

    try:
        entry = gymnasium.spec(env_id).entry_point
    except Exception:  # noqa: BLE001 - gymnasium raises several error types here
        entry = ""
    entry_text = entry if isinstance(entry, str) else f"{entry.__module__}:{entry.__qualname__}"
    if entry_text.startswith("blanket_envs.base_goto"):
        from blanket.agent import mobile_base as base_agent

        return list(base_agent.OPTION_DEFAULTS)
    from blanket.agent.arm import AgentOptions

    return list(AgentOptions.defaults)


def valid_names(env_id: str, agent: Mapping[str, Any] | None = None) -> dict[str, list[str] | None]:
    """The keys each table accepts: ``{"agent": [...] or None, "env_options": [...]}``.

    ``agent`` is None when the scenario names its own agent class (any key is passed on).
    """
    from blanket.scenario import env_option_names

    return {
        "agent": _agent_option_names(env_id, agent or {}),
        "env_options": [k for k in env_option_names(env_id) if k != "render_mode"],
    }


def check_names(specs: Sequence[ParameterSpec], env_id: str, agent: Mapping[str, Any]) -> None:
    """Refuse unknown tables or keys with a one-line error naming the closest valid names."""
    seen: set[str] = set()
    names = valid_names(env_id, agent)
    for spec in specs:
        if spec.name in seen:
            raise ConfigError(f"--vary {spec.name} is given twice")
        seen.add(spec.name)
        table, key = spec.name.split(".", 1)
        if table not in TABLES:
            hint = did_you_mean(spec.name, [f"{t}.{key}" for t in TABLES], n=1)
            raise ConfigError(f"--vary {spec.name}: unknown table {table!r}; {hint}")
        valid = names[table]
        if valid is None or key in valid:
            continue
        hint = did_you_mean(spec.name, [f"{table}.{c}" for c in valid], cutoff=0.5)
        raise ConfigError(f"--vary {spec.name}: unknown {table} key {key!r}; {hint}")


def apply_overrides(scenario: Any, overrides: Mapping[str, Any], suffix: str | None = None) -> Any:
    """A copy of ``scenario`` with dotted-key ``overrides`` set (the input is not changed)."""
    from dataclasses import replace

    tables: dict[str, dict[str, Any]] = {
        "agent": dict(scenario.agent),
        "env_options": dict(scenario.env_options),
    }
    for name, value in overrides.items():
        table, key = name.split(".", 1)
        if table not in tables:
            raise ConfigError(f"override {name}: table must be one of {', '.join(TABLES)}")
        tables[table][key] = value
    name = scenario.name if suffix is None else f"{scenario.name}-{suffix}"
    return replace(scenario, agent=tables["agent"], env_options=tables["env_options"], name=name)


def grid_size(specs: Iterable[ParameterSpec]) -> int:
    """Number of points of the full grid."""
    n = 1
    for s in specs:
        n *= len(s.values)
    return n
