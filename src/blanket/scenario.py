"""Scenario files: which env, its options, and which agent -- read with tomllib only.

A scenario file is TOML::

    name = "tray-a corner cells"          # optional
    env = "blanket/arm-reach-v0"          # an env id (required)
    episodes = 10                         # optional default for --episodes
    seed = 0                              # optional default for --seed

    [env_options]                         # keywords of the env's constructor
    robot = "panda"
    control = "velocity"
    episode_s = 4.0

    [agent]                               # options of the agent
    class = "mypackage.agents:MyAgent"    # optional: an import path you wrote
    order = 2

    [conditions]                          # optional perturbations (blanket.conditions)
    payload_kg = 0.3
    camera_dropout_probability = 0.1

Relative paths (``env_options.urdf``) resolve against the file's folder. Unknown keys are
rejected with the closest valid names. ``[conditions]`` takes the parameters of
:data:`blanket.conditions.PARAMETERS`, checked when the file is read; ``control_hz`` belongs
in one table only (``[env_options]`` or ``[conditions]``), and so does the body model's length
scale (``[agent] length_scale`` or ``[conditions] model_length_scale``).
"""

from __future__ import annotations

import importlib
import inspect
import os
import re
import shutil
import sys
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import gymnasium
import numpy as np

from blanket.conditions import check_conditions, condition_env_options, condition_model_options
from blanket.errors import ConfigError, did_you_mean, shorten

__all__ = [
    "Scenario",
    "load_scenario",
    "load_object",
    "env_option_names",
    "make_env",
    "builtin_scenarios",
    "copy_scenario",
    "scenario_summary",
]

_TOP_KEYS = {"name": str, "env": str, "episodes": int, "seed": int}
MAX_NAME_CHARS = 120
_TABLES = ("env_options", "agent", "conditions")
_PATH_OPTIONS = ("urdf",)
#: Options whose default is None but whose value, when given, must be a string.
_STRING_OPTIONS = ("urdf", "end_effector", "targets", "render_mode")
MAX_EPISODES = 100_000
#: Deepest nesting of tables and arrays a scenario file may hold.
MAX_DEPTH = 8
_IDENTIFIER = r"[A-Za-z_][A-Za-z0-9_]*"
_IMPORT_PATH = re.compile(rf"{_IDENTIFIER}(\.{_IDENTIFIER})*:{_IDENTIFIER}(\.{_IDENTIFIER})*")


@dataclass
class Scenario:
    """A parsed scenario: env id, env options, agent options, conditions and optional defaults.

    ``conditions`` maps parameters of :data:`blanket.conditions.PARAMETERS` to values; apply
    them with :func:`blanket.conditions.apply_conditions` (and give
    :func:`blanket.conditions.condition_env_options` to the env).
    """

    env: str
    env_options: dict[str, Any] = field(default_factory=dict)
    agent: dict[str, Any] = field(default_factory=dict)
    name: str = "scenario"
    episodes: int | None = None
    seed: int | None = None
    source: str | None = None
    conditions: dict[str, Any] = field(default_factory=dict)

    def to_toml(self, relative_to: str | Path | None = None) -> str:
        """Render as TOML text that :func:`load_scenario` reads back.

        With ``relative_to`` (the folder the file will be written to), file paths
        (``env_options.urdf``) are written relative to it, so that the folder and the files
        it names can move together.
        """
        if relative_to is not None:
            options = dict(self.env_options)
            for key in _PATH_OPTIONS:
                if isinstance(options.get(key), str):
                    options[key] = _relative_path(options[key], Path(relative_to))
            return Scenario(**{**self.__dict__, "env_options": options}).to_toml()
        lines = [f"name = {_toml_value(self.name)}", f"env = {_toml_value(self.env)}"]
        if self.episodes is not None:
            lines.append(f"episodes = {self.episodes}")
        if self.seed is not None:
            lines.append(f"seed = {self.seed}")
        tables = [("env_options", self.env_options), ("agent", self.agent)]
        if self.conditions:
            tables.append(("conditions", self.conditions))
        for table, values in tables:
            lines.append("")
            lines.append(f"[{table}]")
            for k, v in values.items():
                if v is not None:
                    lines.append(f"{k} = {_toml_value(v)}")
        return "\n".join(lines) + "\n"


def _relative_path(path: str, folder: Path) -> str:
    """``path`` relative to ``folder`` (forward slashes); absolute when no relative path
    exists (another drive)."""
    target = Path(path).expanduser()
    if not target.is_absolute():
        return path
    try:
        return Path(os.path.relpath(target, folder.resolve())).as_posix()
    except ValueError:
        return str(target)


def builtin_scenarios() -> dict[str, Path]:
    """The scenario files that come with blanket (``blanket_envs/scenarios``), by name."""
    import blanket_envs

    folder = Path(blanket_envs.__file__).parent / "scenarios"
    return {p.stem: p for p in sorted(folder.glob("*.toml"))}


def scenario_summary(path: Path) -> str:
    """The first sentence of a scenario file's leading comment (its description), or ``""``."""
    words: list[str] = []
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.startswith("#"):
            break
        words.append(line.lstrip("#").strip())
    text = " ".join(words)
    end = text.find(". ")
    return text if end < 0 else text[: end + 1]


def copy_scenario(name: str, dest: str | Path = ".", overwrite: bool = False) -> Path:
    """Copy a built-in scenario and the files it names (its URDF) into ``dest``.

    ``dest`` is a folder (the file keeps its name) or a ``.toml`` file name. The URDF goes
    beside the copy, and the copy names it by a path relative to itself, so the folder runs
    as it is and can move. Returns the path of the copied scenario file.
    """
    scenarios = builtin_scenarios()
    if name not in scenarios:
        raise ConfigError(f"scenario {name!r} is not built in; {did_you_mean(name, scenarios)}")
    source = scenarios[name]
    dest = Path(dest)
    target = dest if dest.suffix == ".toml" else dest / source.name
    text = source.read_text(encoding="utf-8")
    data = tomllib.loads(text)
    copies: list[tuple[Path, Path]] = []
    for key in _PATH_OPTIONS:
        value = data.get("env_options", {}).get(key)
        if not isinstance(value, str) or Path(value).is_absolute():
            continue
        asset = (source.parent / value).resolve()
        copies.append((asset, target.parent / asset.name))
        line = re.compile(rf'^(\s*{key}\s*=\s*)"{re.escape(value)}"', re.M)
        text = line.sub(lambda m, a=asset.name: f'{m.group(1)}"{a}"', text, count=1)
    for path in [target, *(c[1] for c in copies)]:
        if path.exists() and not overwrite:
            raise ConfigError(f"{path} exists; choose another destination or pass --overwrite")
    target.parent.mkdir(parents=True, exist_ok=True)
    for asset, copy in copies:
        shutil.copyfile(asset, copy)
    target.write_text(text, encoding="utf-8")
    return target


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list | tuple):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise ConfigError(f"cannot write {v!r} to a scenario file")


def load_object(path: str, what: str = "class") -> Any:
    """Import ``package.module:Name`` -- only an import path the user wrote, never eval."""
    if not isinstance(path, str) or ":" not in path:
        raise ConfigError(f"{what} must be an import path 'package.module:Name', got {path!r}")
    module_name, _, attr = path.partition(":")
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # noqa: BLE001 - report any import failure in one line
        raise ConfigError(f"{what} {path!r} does not load: {type(exc).__name__}: {exc}") from None
    obj = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise ConfigError(f"{what} {path!r} does not load: module has no attribute {part!r}")
        obj = getattr(obj, part)
    return obj


def _entry_point(env_id: str) -> Any:
    try:
        spec = gymnasium.spec(env_id)
    except Exception:  # noqa: BLE001 - gymnasium raises several error types here
        ids = [k for k in gymnasium.registry if k.startswith("blanket/")]
        raise ConfigError(
            f"env {env_id!r} is not registered; {did_you_mean(env_id, ids)}"
        ) from None
    ep = spec.entry_point
    if isinstance(ep, str):
        return load_object(ep, "env entry point")
    return ep


def env_option_names(env_id: str) -> dict[str, Any]:
    """Constructor keywords of an env id and their defaults."""
    cls = _entry_point(env_id)
    sig = inspect.signature(cls.__init__ if inspect.isclass(cls) else cls)
    return {
        name: (None if p.default is inspect.Parameter.empty else p.default)
        for name, p in sig.parameters.items()
        if name != "self" and p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)
    }


def _check_env_options(env_id: str, options: Mapping[str, Any], where: str) -> None:
    valid = env_option_names(env_id)
    for key, value in options.items():
        if key not in valid:
            raise ConfigError(
                f"{where}: unknown env option {key!r} for {env_id}; {did_you_mean(key, valid)}"
            )
        default = valid[key]
        if key in _STRING_OPTIONS and value is not None and not isinstance(value, str):
            raise ConfigError(
                f"{where}: env option {key} must be a string, got {type(value).__name__} {value!r}"
            )
        if isinstance(value, float) and not np.isfinite(value):
            raise ConfigError(f"{where}: env option {key} must be finite, got {value!r}")
        if default is None:
            continue
        if isinstance(default, bool):
            ok = isinstance(value, bool)
            want = "true or false"
        elif isinstance(default, int | float):
            ok = isinstance(value, int | float) and not isinstance(value, bool)
            want = "a number"
        elif isinstance(default, str):
            ok = isinstance(value, str)
            want = "a string"
        else:
            ok, want = True, ""
        if not ok:
            raise ConfigError(
                f"{where}: env option {key} must be {want}, got {type(value).__name__} {value!r}"
            )


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario file (see the module docstring for the format)."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"scenario file {str(path)!r} does not exist")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path.name}: not valid TOML: {exc}") from None
    except RecursionError:  # tomllib parses nested arrays and inline tables recursively
        raise ConfigError(
            f"{path.name}: values nested too deeply to read (a scenario nests at most "
            f"{MAX_DEPTH} levels)"
        ) from None
    return scenario_from_dict(data, base_dir=path.parent, where=path.name)


def _depth(value: Any) -> int:
    """Nesting depth of tables and arrays (a scalar is 0), without recursion."""
    deepest, stack = 0, [(value, 0)]
    while stack:
        item, level = stack.pop()
        deepest = max(deepest, level)
        if isinstance(item, Mapping):
            stack.extend((v, level + 1) for v in item.values())
        elif isinstance(item, list | tuple):
            stack.extend((v, level + 1) for v in item)
    return deepest


def _check_agent_class(path: Any, where: str) -> None:
    """The form of ``[agent] class`` before anything is imported: ``package.module:Name`` of
    identifiers, and not a module of Python's standard library (which holds no agent, and
    some of whose modules act when imported)."""
    if not isinstance(path, str) or not _IMPORT_PATH.fullmatch(path):
        raise ConfigError(
            f"{where}: agent.class must be an import path 'package.module:Name', "
            f"got {shorten(path)}"
        )
    top = path.partition(":")[0].split(".")[0]
    if top in sys.stdlib_module_names or top in sys.builtin_module_names:
        raise ConfigError(
            f"{where}: agent.class {path!r} names the standard library module {top!r}; "
            "give your agent's own package.module:Name"
        )


def scenario_from_dict(
    data: Mapping[str, Any], base_dir: Path | None = None, where: str = "scenario"
) -> Scenario:
    """Validate a scenario given as a mapping (the parsed TOML)."""
    for key in data:
        if key not in _TOP_KEYS and key not in _TABLES:
            raise ConfigError(
                f"{where}: unknown key {key!r}; {did_you_mean(key, [*_TOP_KEYS, *_TABLES])}"
            )
    for key, typ in _TOP_KEYS.items():
        if key in data and (
            not isinstance(data[key], typ) or (typ is int and isinstance(data[key], bool))
        ):
            raise ConfigError(
                f"{where}: {key} must be {'a string' if typ is str else 'a whole number'}, "
                f"got {shorten(data[key])}"
            )
    if len(data.get("name", "")) > MAX_NAME_CHARS:  # it names folders, files and figures
        raise ConfigError(
            f"{where}: name must be at most {MAX_NAME_CHARS} characters, got "
            f"{len(data['name'])} ({shorten(data['name'], 40)})"
        )
    if "env" not in data:
        raise ConfigError(
            f"{where}: missing required key 'env' (an env id such as 'blanket/arm-reach-v0')"
        )
    for table in _TABLES:
        if table in data and not isinstance(data[table], dict):
            raise ConfigError(f"{where}: {table} must be a table ([{table}])")
    depth = _depth(data)
    if depth > MAX_DEPTH:
        raise ConfigError(
            f"{where}: values nested {depth} levels deep; a scenario nests at most {MAX_DEPTH}"
        )
    if "class" in data.get("agent", {}):
        _check_agent_class(data["agent"]["class"], where)
    env_id = data["env"]
    env_options = dict(data.get("env_options", {}))
    for key in _PATH_OPTIONS:
        if key in env_options and isinstance(env_options[key], str) and base_dir is not None:
            p = Path(env_options[key]).expanduser()
            if not p.is_absolute():
                p = (base_dir / p).resolve()
            env_options[key] = str(p)
    _check_env_options(env_id, env_options, where)
    if "episodes" in data and not 1 <= data["episodes"] <= MAX_EPISODES:
        raise ConfigError(f"{where}: episodes must be in 1..{MAX_EPISODES}, got {data['episodes']}")
    agent = dict(data.get("agent", {}))
    conditions = check_conditions(data.get("conditions"), f"{where}: conditions")
    for table, options in (
        ("env_options", condition_env_options(conditions)),
        ("agent", condition_model_options(conditions)),
    ):
        given = env_options if table == "env_options" else agent
        for key in options:
            if key in given:
                raise ConfigError(
                    f"{where}: [conditions] sets the {table} option {key}, and so does "
                    f"[{table}]; keep one"
                )
    return Scenario(
        env=env_id,
        env_options=env_options,
        agent=agent,
        name=data.get("name", Path(where).stem),
        episodes=data.get("episodes"),
        seed=data.get("seed"),
        source=where,
        conditions=conditions,
    )


def make_env(env_id: str, env_options: Mapping[str, Any]) -> gymnasium.Env:
    """``gymnasium.make`` with option checking; config problems become one-line errors."""
    _check_env_options(env_id, env_options, "env_options")
    return gymnasium.make(env_id, **env_options)
