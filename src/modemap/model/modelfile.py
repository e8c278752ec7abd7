"""JSON model file: save, load and validate a :class:`~modemap.model.hybrid.HybridModel`.

The file is plain UTF-8 JSON ("The JavaScript Object Notation (JSON) Data
Interchange Format", IETF RFC 8259, 2017, DOI 10.17487/RFC8259) that a person
can read and any language can evaluate; ``docs/model-file.md`` documents it
field by field.  Writing is atomic
(:mod:`modemap._atomic`) and uses a fixed key order, so two saves of the same
model are byte-identical and two fits diff line by line.  Floats are written
with Python's shortest round-trip ``repr``, so they load back bit for bit.

JSON has no NaN or infinity.  Where a value may legitimately be unknown (the
sampling step, a period, a standard error, anything inside the free-form
sections) a non-finite value is written as ``null``; coefficients, guard
weights and offsets, equilibria and eigenvalues must be finite, and a model
that breaks this is refused on save and on load.

Every problem raises :class:`~modemap._exceptions.ModelFileError` with a one-line
message naming the file and the JSON path, e.g.
``model.json: regimes[1].coefficients.T: expected 6 numbers (one per term), got 5``.
"""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from modemap._atomic import write_text_atomic
from modemap._exceptions import ExpressionError, ModelFileError
from modemap.model.hybrid import FORMS, Equilibrium, Guard, HybridModel, RegimeModel
from modemap.terms.expressions import check_variable_names
from modemap.terms.library import TermLibrary

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "SUPPORTED_VERSIONS",
    "dumps_model",
    "load_model",
    "loads_model",
    "model_from_dict",
    "model_to_dict",
    "save_model",
]

FORMAT_NAME = "modemap-model"
FORMAT_VERSION = 1
SUPPORTED_VERSIONS = (1,)
GUARD_KINDS = ("per-source", "memoryless")
_FREE_SECTIONS = ("derivative", "statistics", "validation", "metadata")

#: Largest model file read, in bytes (checked before reading).  A fitted model is a few
#: kilobytes to a few megabytes; anything this large is not a model file.
MAX_FILE_BYTES = 64 * 2**20
#: Deepest nesting of arrays and objects accepted (checked before parsing).  The model
#: file itself nests seven levels deep; the free-form sections get room to spare.
MAX_DEPTH = 64
#: Longest integer literal accepted, in digits; a longer one cannot be a float anyway.
_MAX_DIGITS = 400


# --------------------------------------------------------------------------- writing


def model_to_dict(model: HybridModel) -> dict[str, Any]:
    """Convert a model to the JSON-ready dictionary of the model file.

    Parameters
    ----------
    model : HybridModel

    Returns
    -------
    dict
        Keys in the file's fixed order; only JSON types (dict, list, str, int,
        float, bool, None).

    Raises
    ------
    ModelFileError
        If a value that must be finite is not, or a free-form section holds a
        value JSON cannot represent.
    """
    return _Writer("<model>").model(model)


def dumps_model(model: HybridModel) -> str:
    """Serialise a model to the text of a model file (validated, newline-terminated).

    Raises
    ------
    ModelFileError
        If the model cannot be written or would not load back.
    """
    return _dumps(model, "<model>")


def save_model(model: HybridModel, path: str | os.PathLike[str]) -> None:
    """Write a model file atomically.

    The text is built and checked completely before the file is touched, so a
    failure leaves any previous file at ``path`` intact and no temporary file.

    Parameters
    ----------
    model : HybridModel
    path : path-like
        Destination, conventionally ``*.json``.

    Raises
    ------
    ModelFileError
        If the model cannot be serialised or the file cannot be written.
    """
    source = os.fspath(path)
    text = _dumps(model, source)
    try:
        write_text_atomic(path, text)
    except OSError as exc:
        raise ModelFileError(
            f"{source}: cannot write the model file: {exc.strerror or exc}"
        ) from exc


def _dumps(model: HybridModel, source: str) -> str:
    data = _Writer(source).model(model)
    _Reader(source, saving=True).model(data)  # what we write must load back
    text = json.dumps(data, indent=2, sort_keys=False, allow_nan=False, ensure_ascii=False)
    try:
        size = len(text.encode("utf-8"))
    except UnicodeEncodeError as exc:
        raise ModelFileError(
            f"{source}: cannot save: text that is not valid Unicode ({exc.reason})"
        ) from None
    if size >= MAX_FILE_BYTES:  # never write a file that would not load back
        raise ModelFileError(
            f"{source}: cannot save: the model file would be {size} bytes, above the limit "
            f"of {MAX_FILE_BYTES} bytes a model file is read with"
        )
    return text + "\n"


def _opt(value: Any) -> float | None:
    """A float, or None when it is missing or not finite."""
    if value is None:
        return None
    x = float(value)
    return x if math.isfinite(x) else None


def _opt_list(values: Any) -> list[float | None]:
    arr = np.asarray(values, dtype=float).ravel()
    out: list[float | None] = arr.tolist()
    if not np.isfinite(arr).all():
        out = [x if math.isfinite(x) else None for x in out]
    return out


class _Writer:
    """Builds the file dictionary; refuses non-finite values where they are not allowed."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, path: str, message: str) -> NoReturn:
        raise ModelFileError(f"{self.source}: cannot save: {path}: {message}")

    def finite(self, values: Any, path: str, labels: list[str] | None = None) -> list[float]:
        arr = np.asarray(values, dtype=float).ravel()
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            at = labels[bad[0]] if labels is not None else f"[{bad[0]}]"
            self.fail(f"{path}{at}", f"{arr[bad[0]]} is not allowed (values here must be finite)")
        return arr.tolist()

    def per_state(self, arr: Any, states: list[str], n_terms: int, path: str, strict: bool) -> dict:
        a = np.asarray(arr, dtype=float)
        if a.shape != (n_terms, len(states)):
            self.fail(
                path,
                f"shape {a.shape} does not match (n_terms, n_states) = ({n_terms}, {len(states)})",
            )
        if strict:
            return {s: self.finite(a[:, j], f"{path}.{s}") for j, s in enumerate(states)}
        return {s: _opt_list(a[:, j]) for j, s in enumerate(states)}

    def model(self, m: HybridModel) -> dict[str, Any]:
        states = [str(s) for s in m.states]
        return {
            "format": FORMAT_NAME,
            "version": FORMAT_VERSION,
            "form": m.form,
            "time_name": m.time_name,
            "states": states,
            "inputs": [str(u) for u in m.inputs],
            "units": {str(k): str(v) for k, v in m.units.items()},
            "step": _opt(m.step),
            "data_range": {str(k): _opt_list(v) for k, v in m.data_range.items()},
            "regimes": [self.regime(r, states, f"regimes[{i}]") for i, r in enumerate(m.regimes)],
            "guard_kind": m.guard_kind,
            "guards": [self.guard(g, f"guards[{i}]") for i, g in enumerate(m.guards)],
            "derivative": self.plain(m.derivative, "derivative"),
            "selection": self.plain(m.selection, "selection"),
            "statistics": self.plain(m.statistics, "statistics"),
            "validation": self.plain(m.validation, "validation"),
            "metadata": self.plain(m.metadata, "metadata"),
        }

    def regime(self, r: RegimeModel, states: list[str], path: str) -> dict[str, Any]:
        n = len(r.terms)
        k = len(states)
        return {
            "id": int(r.id),
            "samples": int(r.samples),
            "terms": [str(t) for t in r.terms],
            "coefficients": self.per_state(r.coefficients, states, n, f"{path}.coefficients", True),
            "stderr": self.per_state(r.stderr, states, n, f"{path}.stderr", False),
            "noise_cov": self.noise_cov(r.noise_cov, k, f"{path}.noise_cov"),
            "inclusion": None
            if r.inclusion is None
            else self.per_state(r.inclusion, states, n, f"{path}.inclusion", False),
            "equilibria": [
                self.equilibrium(e, states, f"{path}.equilibria[{i}]")
                for i, e in enumerate(r.equilibria)
            ],
        }

    def noise_cov(self, value: Any, k: int, path: str) -> list[list[float | None]]:
        a = np.asarray(value, dtype=float)
        if a.shape != (k, k):
            self.fail(path, f"shape {a.shape} does not match (n_states, n_states) = ({k}, {k})")
        return [_opt_list(row) for row in a]

    def equilibrium(self, e: Equilibrium, states: list[str], path: str) -> dict[str, Any]:
        point = {str(s): float(v) for s, v in e.point.items()}
        self.finite(list(point.values()), f"{path}.point", [f".{s}" for s in point])
        ev = np.asarray(e.eigenvalues, dtype=complex).ravel()
        re = self.finite(ev.real, f"{path}.eigenvalues")
        im = self.finite(ev.imag, f"{path}.eigenvalues")
        return {
            "point": point,
            "eigenvalues": [[a, b] for a, b in zip(re, im, strict=True)],
            "stability": str(e.stability),
            "inside": bool(e.inside),
            "time_constants": _opt_list(e.time_constants),
            "period": _opt(e.period),
            "note": str(e.note),
            **({} if e.stderr is None else {"stderr": {s: _opt(e.stderr[s]) for s in states}}),
            **({} if not e.inputs else {"inputs": self.held(e.inputs, f"{path}.inputs")}),
        }

    def held(self, inputs: dict[str, float], path: str) -> dict[str, float]:
        values = {str(k): float(v) for k, v in inputs.items()}
        self.finite(list(values.values()), path, [f".{k}" for k in values])
        return values

    def guard(self, g: Guard, path: str) -> dict[str, Any]:
        return {
            "from": int(g.source),
            "to": int(g.target),
            "terms": [str(t) for t in g.terms],
            "weights": self.finite(g.weights, f"{path}.weights"),
            "offset": self.finite([g.offset], f"{path}.offset", [""])[0],
            "text": str(g.text),
        }

    def plain(self, value: Any, path: str) -> Any:
        """Free-form content as JSON types; non-finite floats become null."""
        if value is None or isinstance(value, str | bool):
            return value
        if isinstance(value, np.bool_):
            return bool(value)
        if isinstance(value, int | np.integer):
            return int(value)
        if isinstance(value, float | np.floating):
            return _opt(value)
        if isinstance(value, dict):
            out: dict[str, Any] = {}
            for key, item in value.items():
                name = self.key(key, path)
                if name in out:
                    self.fail(path, f"two keys both written as '{name}'")
                out[name] = self.plain(item, f"{path}.{name}")
            return out
        if isinstance(value, list | tuple):
            return [self.plain(v, f"{path}[{i}]") for i, v in enumerate(value)]
        if isinstance(value, np.ndarray):
            return self.plain(value.tolist(), path)
        if isinstance(value, os.PathLike):
            return os.fspath(value)
        self.fail(path, f"a value of type {type(value).__name__} cannot be stored in a model file")

    def key(self, key: Any, path: str) -> str:
        if isinstance(key, str):
            return key
        if isinstance(key, int | np.integer) and not isinstance(key, bool | np.bool_):
            return str(int(key))
        self.fail(path, f"key {key!r} is not a string")


# --------------------------------------------------------------------------- reading


def load_model(path: str | os.PathLike[str]) -> HybridModel:
    """Read and validate a model file.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    HybridModel

    Raises
    ------
    ModelFileError
        File missing or unreadable, not UTF-8, not JSON, not a modemap model,
        an unsupported version, or any structural or numerical inconsistency.
    """
    source = os.fspath(path)
    try:
        size = Path(path).stat().st_size
        if size > MAX_FILE_BYTES and Path(path).is_file():
            raise ModelFileError(
                f"{source}: {size} bytes is too large for a model file "
                f"(the limit is {MAX_FILE_BYTES} bytes)"
            )
        with open(path, "rb") as fh:
            raw = fh.read(MAX_FILE_BYTES + 1)
    except FileNotFoundError as exc:
        raise ModelFileError(f"{source}: file not found") from exc
    except IsADirectoryError as exc:
        raise ModelFileError(f"{source}: is a folder, not a model file") from exc
    except OSError as exc:
        raise ModelFileError(f"{source}: cannot read: {exc.strerror or exc}") from exc
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ModelFileError(
            f"{source}: not UTF-8 text (byte {exc.start} cannot be decoded); "
            "model files are UTF-8 JSON"
        ) from exc
    if len(raw) > MAX_FILE_BYTES:  # grew while being read, or not a regular file
        raise ModelFileError(
            f"{source}: too large for a model file (the limit is {MAX_FILE_BYTES} bytes)"
        )
    return loads_model(text, source=source)


def loads_model(text: str, source: str = "<string>") -> HybridModel:
    """Parse and validate the text of a model file.

    Parameters
    ----------
    text : str
    source : str
        Name used in error messages.

    Raises
    ------
    ModelFileError
        Text longer than :data:`MAX_FILE_BYTES` or nested deeper than :data:`MAX_DEPTH`
        (both checked before parsing), an integer too large for a float, invalid JSON, or
        any problem :func:`model_from_dict` finds.
    """
    if not isinstance(text, str):
        raise ModelFileError(f"{source}: expected the text of a model file, got {_kind(text)}")
    if len(text) > MAX_FILE_BYTES:
        raise ModelFileError(
            f"{source}: too large for a model file (the limit is {MAX_FILE_BYTES} bytes)"
        )
    _check_depth(text, source)
    try:
        data = json.loads(
            text,
            parse_constant=_no_constant,
            parse_int=_integer,
            object_pairs_hook=_no_duplicates,
        )
    except json.JSONDecodeError as exc:
        raise ModelFileError(
            f"{source}: invalid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}"
        ) from exc
    except _BigInteger as exc:
        where = _position(text, exc.literal)
        raise ModelFileError(f"{source}: {where}integer {exc}") from None
    except _JsonProblem as exc:
        raise ModelFileError(f"{source}: invalid JSON: {exc}") from None
    except RecursionError:  # a stack smaller than MAX_DEPTH needs (an embedding host)
        raise ModelFileError(f"{source}: nested too deeply to read") from None
    return model_from_dict(data, source=source)


_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)


def _check_depth(text: str, source: str) -> None:
    """Refuse text whose arrays and objects nest deeper than :data:`MAX_DEPTH`.

    Counted on the text with its strings removed, so the parser never recurses that
    deep: Python's parser recurses once per level and would fail with RecursionError.
    """
    if text.count("[") + text.count("{") <= MAX_DEPTH:
        return
    bare = _STRING.sub("", text).encode("utf-8", "surrogatepass")
    codes = np.frombuffer(bare, dtype=np.uint8)
    steps = (
        (codes == ord("[")).astype(np.int8)
        + (codes == ord("{"))
        - (codes == ord("]"))
        - (codes == ord("}"))
    )
    depth = np.cumsum(steps, dtype=np.int64)
    if depth.size and int(depth.max()) > MAX_DEPTH:
        at = int(np.argmax(depth > MAX_DEPTH))
        line = bare[:at].count(b"\n") + 1
        raise ModelFileError(
            f"{source}: arrays and objects nested more than {MAX_DEPTH} deep "
            f"(from line {line}); a model file nests 7 deep"
        )


class _BigInteger(ValueError):
    def __init__(self, literal: str) -> None:
        self.literal = literal
        digits = len(literal.lstrip("-"))
        shown = literal if digits <= 12 else f"{literal[:8]}... ({digits} digits)"
        super().__init__(f"{shown} is too large for a number (the largest is about 1.8e308)")


def _integer(literal: str) -> int:
    """``json.loads``' integer hook: integers a float can hold (Python's limit on the
    digits of an ``int`` would raise ValueError, and a longer one overflows a float)."""
    if len(literal) > _MAX_DIGITS:
        raise _BigInteger(literal)
    value = int(literal)
    try:
        float(value)
    except OverflowError:
        raise _BigInteger(literal) from None
    return value


def _position(text: str, literal: str) -> str:
    match = re.search(r"(?<![\w.+-])" + re.escape(literal) + r"(?![\w.])", text)
    if match is None:
        return ""
    line = text.count("\n", 0, match.start()) + 1
    column = match.start() - (text.rfind("\n", 0, match.start()) + 1) + 1
    return f"line {line}, column {column}: "


def model_from_dict(d: Any, source: str = "<dict>") -> HybridModel:
    """Validate a model-file dictionary and build the model.

    Parameters
    ----------
    d : dict
        As produced by :func:`model_to_dict` or ``json.load``.
    source : str
        Name used in error messages (the file name when loading a file).
    """
    return _Reader(source).model(d)


class _JsonProblem(ValueError):
    pass


def _no_constant(name: str) -> NoReturn:
    raise _JsonProblem(f"{name} is not a JSON number (write null for an unknown value)")


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise _JsonProblem(f"key '{key}' appears twice in the same object")
        out[key] = value
    return out


def _kind(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int) and abs(value) >= 10**15:
        return f"an integer of about {math.ceil(abs(value).bit_length() * math.log10(2))} digits"
    if isinstance(value, int | float):
        return f"the number {value!r}"
    if isinstance(value, str):
        return f"the string {value!r}" if len(value) < 40 else "a string"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "an object"
    return type(value).__name__


def _one_line(text: str) -> str:
    """``text`` with its control characters (a newline inside a quoted value) written as
    escapes, as ``repr`` writes them: an error is one line."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


class _Reader:
    """Validates a model-file dictionary; every failure names the JSON path."""

    def __init__(self, source: str, saving: bool = False) -> None:
        self.source = source
        self.saving = saving

    def fail(self, path: str, message: str) -> NoReturn:
        prefix = f"{self.source}: cannot save" if self.saving else self.source
        text = f"{prefix}: {path}: {message}" if path else f"{prefix}: {message}"
        raise ModelFileError(_one_line(text))

    # --- primitives
    def obj(self, value: Any, path: str) -> dict[str, Any]:
        if not isinstance(value, dict):
            self.fail(path, f"expected an object, got {_kind(value)}")
        return value

    def req(self, d: dict[str, Any], key: str, path: str) -> Any:
        if key not in d:
            self.fail(path, f"missing key '{key}'")
        return d[key]

    def lst(self, value: Any, path: str) -> list[Any]:
        if not isinstance(value, list):
            self.fail(path, f"expected a list, got {_kind(value)}")
        return value

    def text(self, value: Any, path: str) -> str:
        if not isinstance(value, str):
            self.fail(path, f"expected a string, got {_kind(value)}")
        return value

    def flag(self, value: Any, path: str) -> bool:
        if not isinstance(value, bool):
            self.fail(path, f"expected true or false, got {_kind(value)}")
        return value

    def integer(self, value: Any, path: str) -> int:
        if not isinstance(value, int) or isinstance(value, bool) or not 0 <= value < 2**63:
            self.fail(path, f"expected a non-negative integer below 2^63, got {_kind(value)}")
        return value

    def number(self, value: Any, path: str, nullable: bool = False) -> float:
        if value is None and nullable:
            return math.nan
        if not _is_number(value):
            want = "a number or null" if nullable else "a number"
            self.fail(path, f"expected {want}, got {_kind(value)}")
        try:
            x = float(value)
        except OverflowError:  # an int from a dictionary (a file's are checked when parsed)
            x = math.inf
        if not math.isfinite(x):
            self.fail(path, f"number out of range ({value!r}); numbers must be finite")
        return x

    def numbers(
        self, value: Any, path: str, n: int | None, what: str, nullable: bool = False
    ) -> np.ndarray:
        items = self.lst(value, path)
        if n is not None and len(items) != n:
            self.fail(path, f"expected {n} numbers ({what}), got {len(items)}")
        return np.array(
            [self.number(v, f"{path}[{i}]", nullable) for i, v in enumerate(items)], dtype=float
        )

    def names(self, value: Any, path: str, allow_empty: bool = True) -> list[str]:
        items = [self.text(v, f"{path}[{i}]") for i, v in enumerate(self.lst(value, path))]
        if not items and not allow_empty:
            self.fail(path, "expected at least one name")
        for i, name in enumerate(items):
            if not name.strip():
                self.fail(f"{path}[{i}]", "empty name")
            if name in items[:i]:
                self.fail(f"{path}[{i}]", f"duplicate name '{name}'")
        return items

    def per_state(
        self, value: Any, path: str, states: list[str], n: int, nullable: bool
    ) -> np.ndarray:
        d = self.obj(value, path)
        for key in d:
            if key not in states:
                self.fail(path, f"unknown state '{key}' (states are: {', '.join(states)})")
        cols = []
        for s in states:
            if s not in d:
                self.fail(path, f"missing state '{s}' (one list per state)")
            cols.append(self.numbers(d[s], f"{path}.{s}", n, "one per term", nullable))
        return np.column_stack(cols) if cols else np.zeros((n, 0))

    def terms(
        self, value: Any, path: str, variables: list[str], allow_empty: bool = True
    ) -> list[str]:
        terms = self.names(value, path, allow_empty)
        if not terms:
            return terms
        try:
            library = TermLibrary.from_terms(terms, variables)
        except ExpressionError as exc:
            for i, term in enumerate(terms):
                try:
                    TermLibrary.from_terms([term], variables)
                except ExpressionError as single:
                    self.fail(f"{path}[{i}]", f"does not parse: {single}")
            self.fail(path, str(exc))
        for i, (given, canonical) in enumerate(zip(terms, library.terms_, strict=True)):
            if given != canonical:
                self.fail(
                    f"{path}[{i}]", f"term '{given}' is not in canonical form (write '{canonical}')"
                )
        return terms

    def variable_names(self, d: dict[str, Any], key: str, allow_empty: bool) -> list[str]:
        names = self.names(self.req(d, key, ""), key, allow_empty)
        for i, name in enumerate(names):
            try:
                check_variable_names([name])
            except ExpressionError as exc:
                self.fail(f"{key}[{i}]", str(exc))
        return names

    # --- sections
    def header(self, d: dict[str, Any]) -> None:
        if "format" not in d:
            self.fail("", f'not a modemap model file (no "format": "{FORMAT_NAME}")')
        if d["format"] != FORMAT_NAME:
            self.fail(
                "format",
                f"not a modemap model file: expected '{FORMAT_NAME}', got {_kind(d['format'])}",
            )
        version = self.req(d, "version", "")
        supported = ", ".join(str(v) for v in SUPPORTED_VERSIONS)
        if not isinstance(version, int) or isinstance(version, bool):
            self.fail("version", f"expected an integer, got {_kind(version)}")
        if version not in SUPPORTED_VERSIONS:
            hint = "; a newer modemap wrote it" if version > max(SUPPORTED_VERSIONS) else ""
            self.fail(
                "version",
                f"unsupported version {version} (this modemap reads version {supported}){hint}",
            )

    def model(self, data: Any) -> HybridModel:
        d = self.obj(data, "")
        self.header(d)
        form = self.text(self.req(d, "form", ""), "form")
        if form not in FORMS:
            self.fail("form", f"unknown form '{form}' (expected one of: {', '.join(FORMS)})")
        states = self.variable_names(d, "states", allow_empty=False)
        inputs = self.variable_names(d, "inputs", allow_empty=True)
        for i, name in enumerate(inputs):
            if name in states:
                self.fail(f"inputs[{i}]", f"'{name}' is also a state")
        variables = states + inputs
        regimes = self.regimes(self.req(d, "regimes", ""), states, variables)
        ids = [r.id for r in regimes]
        guards = [
            self.guard(g, f"guards[{i}]", ids, variables)
            for i, g in enumerate(self.lst(d.get("guards", []), "guards"))
        ]
        guard_kind = self.text(d.get("guard_kind", "per-source"), "guard_kind")
        if guard_kind not in GUARD_KINDS:
            self.fail(
                "guard_kind",
                f"unknown guard kind '{guard_kind}' (expected one of: {', '.join(GUARD_KINDS)})",
            )
        step = self.number(d.get("step"), "step", nullable=True)
        if step <= 0:
            self.fail("step", f"expected a positive number or null, got {step!r}")
        free = {key: self.obj(d.get(key, {}), key) for key in _FREE_SECTIONS}
        selection = self.lst(d.get("selection", []), "selection")
        for i, row in enumerate(selection):
            self.obj(row, f"selection[{i}]")
        return HybridModel(
            states=states,
            inputs=inputs,
            form=form,
            regimes=regimes,
            guards=guards,
            time_name=self.text(d.get("time_name", "time"), "time_name"),
            units=self.units(d.get("units", {})),
            step=step,
            guard_kind=guard_kind,
            data_range=self.data_range(d.get("data_range", {}), variables),
            selection=selection,
            **free,
        )

    def units(self, value: Any) -> dict[str, str]:
        d = self.obj(value, "units")
        return {k: self.text(v, f"units.{k}") for k, v in d.items()}

    def data_range(self, value: Any, variables: list[str]) -> dict[str, tuple[float, float]]:
        out = {}
        for key, pair in self.obj(value, "data_range").items():
            if key not in variables:
                self.fail("data_range", f"unknown variable '{key}'")
            lo, hi = self.numbers(pair, f"data_range.{key}", 2, "min and max", nullable=True)
            out[key] = (float(lo), float(hi))
        return out

    def regimes(self, value: Any, states: list[str], variables: list[str]) -> list[RegimeModel]:
        items = self.lst(value, "regimes")
        if not items:
            self.fail("regimes", "expected at least one regime")
        out: list[RegimeModel] = []
        for i, item in enumerate(items):
            r = self.regime(item, f"regimes[{i}]", states, variables)
            if any(o.id == r.id for o in out):
                self.fail(f"regimes[{i}].id", f"duplicate regime id {r.id}")
            out.append(r)
        return out

    def regime(self, value: Any, path: str, states: list[str], variables: list[str]) -> RegimeModel:
        d = self.obj(value, path)
        for key in ("id", "samples", "terms", "coefficients", "equilibria"):
            self.req(d, key, path)
        terms = self.terms(d["terms"], f"{path}.terms", variables, allow_empty=False)
        n, k = len(terms), len(states)
        nan = np.full((n, k), np.nan)
        stderr = d.get("stderr")
        inclusion = d.get("inclusion")
        return RegimeModel(
            id=self.integer(d["id"], f"{path}.id"),
            samples=self.integer(d["samples"], f"{path}.samples"),
            terms=terms,
            coefficients=self.per_state(
                d["coefficients"], f"{path}.coefficients", states, n, False
            ),
            stderr=nan
            if stderr is None
            else self.per_state(stderr, f"{path}.stderr", states, n, True),
            noise_cov=self.noise_cov(d.get("noise_cov"), f"{path}.noise_cov", k),
            equilibria=[
                self.equilibrium(e, f"{path}.equilibria[{j}]", states, variables[k:])
                for j, e in enumerate(self.lst(d["equilibria"], f"{path}.equilibria"))
            ],
            inclusion=None
            if inclusion is None
            else self.per_state(inclusion, f"{path}.inclusion", states, n, True),
        )

    def noise_cov(self, value: Any, path: str, k: int) -> np.ndarray:
        if value is None:
            return np.full((k, k), np.nan)
        rows = self.lst(value, path)
        if len(rows) != k:
            self.fail(path, f"expected {k} rows (one per state), got {len(rows)}")
        return np.array(
            [self.numbers(r, f"{path}[{i}]", k, "one per state", True) for i, r in enumerate(rows)]
        ).reshape(k, k)

    def equilibrium(
        self, value: Any, path: str, states: list[str], inputs: list[str] | None = None
    ) -> Equilibrium:
        d = self.obj(value, path)
        for key in ("point", "eigenvalues", "stability", "inside"):
            self.req(d, key, path)
        point = self.obj(d["point"], f"{path}.point")
        for key in point:
            if key not in states:
                self.fail(f"{path}.point", f"unknown state '{key}'")
        for s in states:
            if s not in point:
                self.fail(f"{path}.point", f"missing state '{s}'")
        pairs = self.lst(d["eigenvalues"], f"{path}.eigenvalues")
        if len(pairs) != len(states):
            self.fail(
                f"{path}.eigenvalues",
                f"expected {len(states)} eigenvalues (one per state), got {len(pairs)}",
            )
        ev = [
            self.numbers(p, f"{path}.eigenvalues[{i}]", 2, "[real, imaginary] pair")
            for i, p in enumerate(pairs)
        ]
        tcs = self.numbers(
            d.get("time_constants", []), f"{path}.time_constants", None, "", nullable=True
        )
        period = self.number(d.get("period"), f"{path}.period", nullable=True)
        stderr = None
        if d.get("stderr") is not None:
            raw = self.obj(d["stderr"], f"{path}.stderr")
            for key in raw:
                if key not in states:
                    self.fail(f"{path}.stderr", f"unknown state '{key}'")
            stderr = {}
            for s in states:
                value = self.number(raw.get(s), f"{path}.stderr.{s}", nullable=True)
                if value < 0:
                    self.fail(f"{path}.stderr.{s}", "a standard error cannot be negative")
                stderr[s] = math.inf if math.isnan(value) else value
        held: dict[str, float] = {}
        if d.get("inputs") is not None:
            raw = self.obj(d["inputs"], f"{path}.inputs")
            for key in raw:
                if key not in (inputs or []):
                    self.fail(f"{path}.inputs", f"unknown input '{key}'")
                held[key] = self.number(raw[key], f"{path}.inputs.{key}")
        return Equilibrium(
            inputs=held,
            point={s: self.number(point[s], f"{path}.point.{s}") for s in states},
            eigenvalues=np.array([complex(a, b) for a, b in ev], dtype=complex),
            stability=self.text(d["stability"], f"{path}.stability"),
            inside=self.flag(d["inside"], f"{path}.inside"),
            time_constants=[math.inf if math.isnan(t) else float(t) for t in tcs],
            period=None if math.isnan(period) else period,
            note=self.text(d.get("note", ""), f"{path}.note"),
            stderr=stderr,
        )

    def guard(self, value: Any, path: str, ids: list[int], variables: list[str]) -> Guard:
        d = self.obj(value, path)
        for key in ("from", "to", "terms", "weights", "offset"):
            self.req(d, key, path)
        source = self.integer(d["from"], f"{path}.from")
        target = self.integer(d["to"], f"{path}.to")
        for key, rid in (("from", source), ("to", target)):
            if rid not in ids:
                self.fail(
                    f"{path}.{key}",
                    f"no regime with id {rid} (ids are: {', '.join(map(str, ids))})",
                )
        if source == target:
            self.fail(path, f"a guard from regime {source} to itself")
        terms = self.terms(d["terms"], f"{path}.terms", variables)
        return Guard(
            source=source,
            target=target,
            terms=terms,
            weights=self.numbers(d["weights"], f"{path}.weights", len(terms), "one per term"),
            offset=self.number(d["offset"], f"{path}.offset"),
            text=self.text(d.get("text", ""), f"{path}.text"),
        )
