"""The built-in protocol library and bench files, and resolving "a path or a built-in name"."""

from __future__ import annotations

import importlib.resources
from dataclasses import dataclass
from importlib.abc import Traversable
from pathlib import Path

from lightloom.sequencer.errors import InputError
from lightloom.sequencer.lang.yamlsafe import MAX_BYTES

PROTOCOL_PACKAGE = "lightloom.protocols"
BENCH_PACKAGE = "lightloom.simulators"
SUFFIX = ".yaml"


@dataclass(frozen=True)
class Source:
    """The bytes of a protocol or bench file and where they came from.

    ``file`` is the name used in messages; ``directory`` resolves relative ``extends:`` paths;
    ``builtin`` is the built-in name when the file is part of the library.
    """

    file: str
    data: bytes
    directory: Path | None
    builtin: str | None


def protocol_directory() -> Traversable:
    """Where the built-in protocols are: the installed package, else protocols/ beside this package."""
    try:
        return importlib.resources.files(PROTOCOL_PACKAGE)
    except ModuleNotFoundError:
        return Path(__file__).resolve().parents[2] / "protocols"


def bench_directory() -> Traversable:
    """Where the built-in benches are (package data of ``simulators``)."""
    return importlib.resources.files(BENCH_PACKAGE) / "benches"


def _names(directory: Traversable) -> dict[str, Traversable]:
    if not directory.is_dir():
        return {}
    return {
        entry.name[: -len(SUFFIX)]: entry
        for entry in directory.iterdir()
        if entry.name.endswith(SUFFIX) and entry.is_file()
    }


def builtin_protocols() -> tuple[str, ...]:
    """Names of the built-in protocols, sorted."""
    return tuple(sorted(_names(protocol_directory())))


def builtin_benches() -> tuple[str, ...]:
    """Names of the built-in benches, sorted."""
    return tuple(sorted(_names(bench_directory())))


def _read_limited(opener) -> bytes:
    # Read one byte past the limit so that yamlsafe.decode can refuse an over-large file
    # without this process reading a huge file into memory.
    with opener() as handle:
        return handle.read(MAX_BYTES + 1)


def find(kind: str, spec: str, base_dir: Path | None = None) -> Source:
    """Resolve ``spec`` (a path, or a built-in name with or without ``.yaml``) for ``kind``.

    ``kind`` is ``"protocol"`` or ``"bench"``. A path that exists wins over a built-in name;
    relative paths are taken from ``base_dir`` when given (the directory of an extending bench).

    Raises
    ------
    InputError
        Without a file or line (the caller adds its own) when nothing matches.
    """
    if kind not in ("protocol", "bench"):
        raise ValueError(f"kind must be 'protocol' or 'bench', got {kind!r}")
    path = Path(spec)
    if base_dir is not None and not path.is_absolute():
        path = base_dir / path
    if path.is_dir():
        raise InputError(f"'{spec}' is a directory; expected a {kind} YAML file or a built-in {kind} name")
    if path.is_file():
        try:
            data = _read_limited(lambda: open(path, "rb"))
        except OSError as exc:
            raise InputError(f"cannot read {kind} file '{spec}': {exc.strerror}") from None
        return Source(str(path), data, path.resolve().parent, None)
    library = _names(protocol_directory() if kind == "protocol" else bench_directory())
    name = spec[: -len(SUFFIX)] if spec.endswith(SUFFIX) else spec
    entry = library.get(name)
    if entry is None:
        raise InputError(
            f"no {kind} file '{spec}' and no built-in {kind} of that name; "
            f"give a path to a YAML file or one of: {', '.join(sorted(library))}"
        )
    directory = Path(str(entry)).parent if isinstance(entry, Path) else None
    return Source(str(entry), _read_limited(lambda: entry.open("rb")), directory, name)
