"""Read a scenario file, validate it completely, and keep its text.

:func:`load_scenario` is the one way in: TOML is parsed (data only: no code
is executed, nothing is unpickled, no path is opened but the file itself),
every key is checked against the vocabulary, cross-key checks follow, and a
:class:`Scenario` comes back with SI values, the defaults filled in, and the
original text for the results file.
"""
import copy
import math
import os
import re
import sys
from dataclasses import dataclass, field

from .checks import check_all
from .errors import ScenarioError
from .schema import Fail, validate
from .vocabulary import SCENARIO

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    import tomli as tomllib

#: Largest scenario file read (a scenario is a page of text, not a data set).
MAX_BYTES = 20 * 1024 * 1024


@dataclass
class Scenario:
    """A validated scenario.

    Attributes
    ----------
    path : str
        The file it came from (``"<string>"`` for text).
    text : str
        The scenario as TOML text: the file as written, or (with overrides) the
        document with the overrides applied, re-emitted.
    data : dict
        The validated document: SI floats, numpy arrays for vectors and point
        lists, every default filled in.
    overrides : dict
        The dotted-key overrides applied at load time (empty for none).
    """

    path: str
    text: str
    data: dict
    overrides: dict = field(default_factory=dict)

    def __getitem__(self, key):
        return self.data[key]

    @property
    def name(self):
        """The title, or the file's stem."""
        return self.data["title"] or os.path.splitext(os.path.basename(self.path))[0]

    @property
    def seed(self):
        return self.data["seed"]

    @property
    def steps(self):
        """Number of time steps to the end time."""
        t = self.data["time"]
        return max(1, math.ceil(t["end"] / t["step"] - 1e-9))

    def replace(self, overrides):
        """A new scenario from the same text with more overrides (validated again).

        Parameters
        ----------
        overrides : dict
            Dotted key path (``"time.end"``, ``"populations[0].diameter"``) to
            a raw value as it would be written in the file (``"30 kV"``, 0.1).
        """
        base = dict(self.overrides)
        base.update(overrides)
        raw_text = self._original_text
        return loads_scenario(raw_text, path=self.path, overrides=base)

    # the text before overrides (overrides always re-apply onto it)
    _original_text: str = field(default="", repr=False)


def load_scenario(path, overrides=None):
    """Load and validate a scenario file.

    Parameters
    ----------
    path : str or os.PathLike
        The TOML file.
    overrides : dict, optional
        Dotted key path to raw value, applied before validation (sweeps,
        shortened test runs): ``{"time.end": "0.1 s"}``.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        For a file that cannot be read, is not TOML, or does not validate; the
        message names the file, the key path and the bad value.
    """
    p = os.fspath(path)
    try:
        size = os.path.getsize(p)
        if size > MAX_BYTES:
            raise ScenarioError(p, "", f"file is {size} bytes; a scenario file is at most {MAX_BYTES} bytes")
        with open(p, "rb") as fh:
            raw = fh.read()
    except ScenarioError:
        raise
    except OSError as exc:
        raise ScenarioError(p, "", f"cannot read the file ({exc.strerror or exc})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioError(p, "", f"not UTF-8 text (byte {exc.start})") from None
    return loads_scenario(text, path=p, overrides=overrides)


def loads_scenario(text, path="<string>", overrides=None):
    """Validate scenario text (see :func:`load_scenario`)."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(path, "", f"not valid TOML: {exc}") from None
    overrides = dict(overrides or {})
    for key, value in overrides.items():
        set_key(doc, key, value, path)
    data = _validate_document(doc, path)
    shown = text if not overrides else _overridden_text(text, doc, overrides)
    return Scenario(path=str(path), text=shown, data=data, overrides=overrides, _original_text=text)


def _validate_document(doc, path):
    from ..physics import hazards

    data = validate(SCENARIO, doc, path)
    try:
        check_all(data, atmospheres=hazards.atmospheres())
    except Fail as exc:
        raise ScenarioError(path, exc.path, exc.reason) from None
    return data


_PART = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)((?:\[\d+\])*)$")


def set_key(doc, key, value, path="<overrides>"):
    """Set a dotted key path (``"populations[0].diameter"``) in a raw document.

    Tables on the way are created; list indices must exist. Raises
    :class:`ScenarioError` for a malformed path.
    """
    parts = str(key).split(".")
    node = doc
    for n, part in enumerate(parts):
        m = _PART.match(part)
        if m is None:
            raise ScenarioError(path, str(key), "not a key path (names joined by '.', list indices as [0])")
        name, idx = m.group(1), [int(i) for i in re.findall(r"\[(\d+)\]", m.group(2))]
        last = n == len(parts) - 1 and not idx
        if last:
            if not isinstance(node, dict):
                raise ScenarioError(path, str(key), "the path runs through a value that is not a table")
            node[name] = copy.deepcopy(value)
            return
        if not isinstance(node, dict):
            raise ScenarioError(path, str(key), "the path runs through a value that is not a table")
        if name not in node:
            if idx:
                raise ScenarioError(path, str(key), f"there is no list {name!r} to index")
            node[name] = {}
        child = node[name]
        for j, i in enumerate(idx):
            if not isinstance(child, list) or i >= len(child):
                raise ScenarioError(path, str(key), f"index {i} is out of range")
            if j == len(idx) - 1 and n == len(parts) - 1:
                child[i] = copy.deepcopy(value)
                return
            child = child[i]
        node = child


def _overridden_text(text, doc, overrides):
    lines = ["# scenario with overrides applied at load time:"]
    lines += [f"#   {k} = {_value(v)}" for k, v in overrides.items()]
    lines += ["# original text, as a comment:"]
    lines += ["# " + line for line in text.splitlines()]
    lines += ["", dump_toml(doc)]
    return "\n".join(lines)


def _value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_bare(k)} = {_value(x)}" for k, x in v.items()) + "}"
    if hasattr(v, "isoformat"):  # TOML dates and times
        return v.isoformat()
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def _bare(k):
    return k if re.fullmatch(r"[A-Za-z0-9_-]+", k) else _value(str(k))


def dump_toml(doc):
    """TOML text of a parsed document (tables, arrays of tables, values)."""
    out = []

    def table(d, prefix):
        scalars = [(k, v) for k, v in d.items() if not _is_table(v) and not _is_tables(v)]
        for k, v in scalars:
            out.append(f"{_bare(k)} = {_value(v)}")
        for k, v in d.items():
            name = f"{prefix}.{_bare(k)}" if prefix else _bare(k)
            if _is_table(v):
                out.append("")
                out.append(f"[{name}]")
                table(v, name)
            elif _is_tables(v):
                for item in v:
                    out.append("")
                    out.append(f"[[{name}]]")
                    table(item, name)

    table(doc, "")
    return "\n".join(out).strip() + "\n"


def _is_table(v):
    return isinstance(v, dict)


def _is_tables(v):
    return isinstance(v, list) and len(v) > 0 and all(isinstance(x, dict) for x in v)
