"""Settings, in one place.

Precedence, highest first: explicit arguments (command-line options), then
environment variables, then ``codeseek.toml`` at the repository root, then the
defaults below. The environment variables codeseek reads are listed in
:data:`ENV_VARS` (README documents them) and are read nowhere else.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from codeseek.display import printable
from codeseek.errors import ConfigError, FileRefused
from codeseek.safefs import read_regular_file

INDEX_DIR_NAME = ".codeseek"
CONFIG_FILE_NAME = "codeseek.toml"
DEFAULT_BACKEND = "onnx"
BACKENDS = ("onnx", "torch", "fake")
# embedding tiers (codeseek/tiers.py); a new index takes DEFAULT_TIER, an existing one
# keeps the tier it was built with unless one is named
TIERS = ("full", "int8", "static")
DEFAULT_TIER = "full"
DEFAULT_MAX_FILE_BYTES = 1024 * 1024
DEFAULT_BATCH_SIZE = 32
DEFAULT_TOP_K = 10
# a new index with more source than this to parse is built searchable first: the static
# tier at once, the full tier filled in behind (codeseek/refine.py). 4 MB is about 6,400
# units (the standard-library copy holds 1,580 units per MB), a full build of over a
# minute on an idle 2-core machine and some three minutes on a busy one
DEFAULT_REFINE_ABOVE_BYTES = 4 * 1000 * 1000
# codeseek.toml is read only if it is a regular file itself (not a link, not a FIFO)
# of at most this many bytes; settings never need more
MAX_CONFIG_FILE_BYTES = 1024 * 1024

ENV_VARS: dict[str, str] = {
    "CODESEEK_INDEX_DIR": "folder of the index (default: <repo>/.codeseek)",
    "CODESEEK_MODEL": "path of a local sentence-transformers model folder",
    "CODESEEK_BACKEND": "embedding backend: onnx (default), torch or fake",
    "CODESEEK_TIER": "embedding tier of a new index: full (default), int8 or static",
    "CODESEEK_CACHE_DIR": "where the exported ONNX model is cached "
    "(default: $XDG_CACHE_HOME/codeseek or ~/.cache/codeseek)",
    "CODESEEK_MAX_FILE_BYTES": "files larger than this are skipped (default 1048576)",
}


@dataclass(frozen=True)
class Settings:
    """Everything that changes how a repository is indexed and searched.

    Attributes:
        repo: the repository root (absolute).
        index_dir: the index folder (absolute).
        model: a local sentence-transformers folder, or None for the packaged default.
        backend: ``onnx`` (default), ``torch`` (the reference) or ``fake`` (tests).
        max_file_bytes: larger files are skipped with a counted reason.
        exclude: extra gitignore-style patterns that are never indexed.
        include_vendored: index ``vendor/`` and similar dependency folders too.
        batch_size: texts per embedding batch.
        cache_dir: where derived model files (the ONNX export) are cached.
        tier: the embedding tier asked for (``full``, ``int8`` or ``static``), or None:
            an existing index's own tier, DEFAULT_TIER for a new one.
        refine: build a new index searchable first (codeseek/refine.py): True, False,
            or None: when it has more than ``refine_above_bytes`` of source to parse.
        refine_above_bytes: the size from which a new index is built searchable first.
    """

    repo: Path
    index_dir: Path
    model: Path | None = None
    backend: str = DEFAULT_BACKEND
    max_file_bytes: int = DEFAULT_MAX_FILE_BYTES
    exclude: tuple[str, ...] = ()
    include_vendored: bool = False
    batch_size: int = DEFAULT_BATCH_SIZE
    cache_dir: Path = field(default_factory=lambda: default_cache_dir(os.environ))
    tier: str | None = None
    refine: bool | None = None
    refine_above_bytes: int = DEFAULT_REFINE_ABOVE_BYTES

    def with_changes(self, **changes: Any) -> Settings:
        """A copy with some fields replaced."""
        return replace(self, **changes)


def default_cache_dir(env: Mapping[str, str]) -> Path:
    """The user's cache folder for codeseek."""
    if env.get("CODESEEK_CACHE_DIR"):
        return Path(env["CODESEEK_CACHE_DIR"]).expanduser()
    base = env.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base).expanduser() / "codeseek"


def load_settings(
    repo: str | os.PathLike[str],
    *,
    index_dir: str | os.PathLike[str] | None = None,
    model: str | os.PathLike[str] | None = None,
    backend: str | None = None,
    env: Mapping[str, str] | None = None,
    tier: str | None = None,
) -> Settings:
    """Build the settings for ``repo`` from arguments, environment and codeseek.toml."""
    env = os.environ if env is None else env
    root = Path(repo).expanduser().resolve()
    file_values = _read_config_file(root / CONFIG_FILE_NAME)

    def pick(arg: Any, env_name: str, key: str) -> Any:
        if arg is not None:
            return arg
        if env.get(env_name):
            return env[env_name]
        return file_values.get(key)

    def where(env_name: str, key: str) -> str:
        """Where a setting came from, for its error message."""
        return env_name if env.get(env_name) else f"{root / CONFIG_FILE_NAME}: {key}"

    def pick_path(arg: Any, env_name: str, key: str, option: str) -> Path | None:
        # an argument or variable is the user's, from where they stand; a value in
        # codeseek.toml belongs to the repository and is relative to its root
        chosen = pick(arg, env_name, key)
        from_file = arg is None and not env.get(env_name)
        name = where(env_name, key) if arg is None else option
        _check_path(chosen, name)
        if not chosen:
            return None
        if from_file and key == "model":
            # the repository's author writes codeseek.toml: a model folder it picks is
            # code it runs (the torch backend unpickles weights)
            raise ConfigError(f"{name}: codeseek.toml cannot choose the model (a "
                              "repository could make codeseek load code of its choosing); "
                              "use --model or CODESEEK_MODEL instead")
        path = _resolve_against(root if from_file else Path.cwd(), chosen, name)
        if from_file and not path.resolve().is_relative_to(root):
            # nor write outside it: only --index-dir and CODESEEK_INDEX_DIR may
            raise ConfigError(f"{name}: {printable(str(chosen))} is outside the repository; "
                              "codeseek.toml may only place the index inside it (use "
                              "--index-dir or CODESEEK_INDEX_DIR for a folder elsewhere)")
        return path

    index_path = (pick_path(index_dir, "CODESEEK_INDEX_DIR", "index_dir", "--index-dir")
                  or root / INDEX_DIR_NAME)
    model_path = pick_path(model, "CODESEEK_MODEL", "model", "--model")
    chosen_backend = str(pick(backend, "CODESEEK_BACKEND", "backend") or DEFAULT_BACKEND)
    if chosen_backend not in BACKENDS:
        raise ConfigError(
            f"unknown embedding backend {chosen_backend!r}; choose one of: {', '.join(BACKENDS)}"
        )
    chosen_tier = pick(tier, "CODESEEK_TIER", "tier")
    if chosen_tier is not None and chosen_tier not in TIERS:
        name = "--tier" if tier is not None else where("CODESEEK_TIER", "tier")
        raise ConfigError(f"{name}: unknown tier {chosen_tier!r}; choose one of: "
                          f"{', '.join(TIERS)}")
    max_bytes = pick(None, "CODESEEK_MAX_FILE_BYTES", "max_file_bytes")
    refine = file_values.get("refine")
    if refine is not None and not isinstance(refine, bool):
        raise ConfigError(f"{root / CONFIG_FILE_NAME}: refine must be true or false (leave "
                          f"it out to decide by the repository's size), not {refine!r}")
    exclude = file_values.get("exclude", [])
    if not isinstance(exclude, list) or not all(isinstance(p, str) for p in exclude):
        raise ConfigError(f"{root / CONFIG_FILE_NAME}: 'exclude' must be a list of patterns")
    return Settings(
        repo=root,
        index_dir=index_path,
        model=model_path,
        backend=chosen_backend,
        max_file_bytes=_positive_int(max_bytes, where("CODESEEK_MAX_FILE_BYTES",
                                                      "max_file_bytes"),
                                     DEFAULT_MAX_FILE_BYTES),
        exclude=tuple(exclude),
        include_vendored=bool(file_values.get("include_vendored", False)),
        batch_size=_positive_int(
            file_values.get("batch_size"), f"{root / CONFIG_FILE_NAME}: batch_size",
            DEFAULT_BATCH_SIZE
        ),
        cache_dir=default_cache_dir(env),
        tier=chosen_tier,
        refine=refine,
        refine_above_bytes=_positive_int(
            file_values.get("refine_above_bytes"),
            f"{root / CONFIG_FILE_NAME}: refine_above_bytes", DEFAULT_REFINE_ABOVE_BYTES),
    )


def _resolve_against(base: Path, value: str | os.PathLike[str], name: str) -> Path:
    """``value`` as an absolute path: itself if absolute, else relative to ``base``."""
    if "\0" in os.fspath(value):
        raise ConfigError(f"{name}: {printable(os.fspath(value))} holds a NUL byte, which "
                          "no file name can hold")
    try:
        path = Path(value).expanduser()
        return path if path.is_absolute() else (base / path).resolve()
    except RuntimeError:  # "~user" of no known user (pathlib's expanduser)
        raise ConfigError(f"{name}: {printable(os.fspath(value))}: no such user's home "
                          "folder") from None


MAX_SETTING_INT = 2**40  # 1 TiB: far above any real limit, far below what read() takes


def _check_path(value: Any, name: str) -> None:
    """A folder setting must be text (TOML gives numbers and tables as they are)."""
    if value is not None and not isinstance(value, str | os.PathLike):
        raise ConfigError(f"{name} must be a folder path in quotes, not {value!r}")


def _positive_int(value: Any, name: str, default: int) -> int:
    """A whole number from 1 to MAX_SETTING_INT; a float such as 2.5 or 1e99 is refused,
    never truncated (``int(2.5)`` would make a 2-byte file limit)."""
    if value is None or value == "":
        return default
    if isinstance(value, bool) or not isinstance(value, int | str):
        raise ConfigError(f"{name} must be a whole number, not {value!r}")
    try:
        number = int(value)
    except ValueError:
        raise ConfigError(f"{name} must be a whole number, not {value!r}") from None
    if number <= 0:
        raise ConfigError(f"{name} must be positive, not {number}")
    if number > MAX_SETTING_INT:
        raise ConfigError(f"{name} must be at most {MAX_SETTING_INT}, not {number}")
    return number


def _read_config_file(path: Path) -> dict[str, Any]:
    try:
        data = tomllib.loads(read_regular_file(path, MAX_CONFIG_FILE_BYTES).decode("utf-8"))
    except FileNotFoundError:
        return {}
    except FileRefused as exc:
        raise ConfigError(f"{path}: cannot read settings: {exc}") from None
    except UnicodeDecodeError as exc:  # TOML is UTF-8 by definition (toml.io, v1.0.0)
        raise ConfigError(f"{path}: cannot read settings: not UTF-8 text (byte "
                          f"0x{exc.object[exc.start]:02x} at offset {exc.start})") from None
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read settings: {exc}") from exc
    section = data.get("codeseek", data)
    if not isinstance(section, dict):
        raise ConfigError(f"{path}: [codeseek] must be a table")
    return section
