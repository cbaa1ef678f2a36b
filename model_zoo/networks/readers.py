"""Read and write discrete Bayesian-network files through pgmpy's readers, with our own checks.

Supported: ``.bif`` and ``.bif.gz`` (BIF, Hulten & Domingos' interchange format), ``.xmlbif`` /
``.xml`` (XMLBIF 0.3), ``.uai`` (UAI 'BAYES' files; pgmpy names the variables ``var_0``, ...),
and the bare names of the networks bundled inside the pgmpy wheel (``asia``, ``alarm``, ...; see
:func:`bundled_networks`), which are read offline from
``pgmpy/utils/example_models/NAME.bif.gz``.

Every failure is an :class:`~model_zoo.errors.InputError` with one line naming the file (and the
line, for BIF, where it can be found): a truncated or corrupt file, a variable without a table, a
CPT column not summing to one (tolerance 1e-6; columns within tolerance are renormalised, because
several bundled networks — alarm, water, munin1 — are off by ~1e-7), a cycle.
"""

from __future__ import annotations

import gzip
import importlib.util
import re
from pathlib import Path

import numpy as np

from model_zoo.discrete import DiscreteNetwork
from model_zoo.errors import InputError
from model_zoo.networks.pgmpy_bridge import from_pgmpy, to_pgmpy, topological_order

__all__ = ["bundled_networks", "bundled_path", "read_network", "write_network",
           "NORMALISATION_TOLERANCE"]

#: Largest |column sum - 1| accepted in a file's CPT before renormalising it.
NORMALISATION_TOLERANCE = 1e-6

_SUFFIXES = (".bif", ".bif.gz", ".xmlbif", ".xml", ".uai")


def _example_dir() -> Path | None:
    # find_spec locates pgmpy without importing it (import pgmpy costs ~1 s).
    spec = importlib.util.find_spec("pgmpy")
    if spec is None or not spec.submodule_search_locations:
        return None
    return Path(list(spec.submodule_search_locations)[0]) / "utils" / "example_models"


def bundled_networks() -> list[str]:
    """Names of the BIF networks shipped inside the installed pgmpy wheel (sorted)."""
    folder = _example_dir()
    if folder is None or not folder.is_dir():
        return []
    return sorted(p.name[: -len(".bif.gz")] for p in folder.glob("*.bif.gz"))


def bundled_path(name: str) -> Path:
    """The file of a bundled network; unknown name -> InputError listing the known ones."""
    folder = _example_dir()
    path = folder / f"{name}.bif.gz" if folder is not None else None
    if path is None or not path.is_file():
        raise InputError.at("network", None, "a model file (.bif, .bif.gz, .xmlbif, .uai) or one "
                            "of the bundled networks " + ", ".join(bundled_networks()), name)
    return path


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def _line_of(text: str, pos: int) -> int:
    return text.count("\n", 0, pos) + 1


def _check_braces(text: str, label: str) -> None:
    """A truncated BIF file usually ends inside a block: find the first unclosed '{'."""
    depth = 0
    opened: list[int] = []
    for m in re.finditer(r"[{}]", text):
        if m.group() == "{":
            opened.append(m.start())
            depth += 1
        else:
            if not opened:
                raise InputError(f"{label} line {_line_of(text, m.start())}: unexpected '}}'")
            opened.pop()
    if opened:
        raise InputError(f"{label} line {_line_of(text, opened[-1])}: block opened here is never "
                         "closed (file truncated?); expected a complete BIF file")


def _cpt_line(text: str, var: str) -> int | None:
    m = re.search(r"probability\s*\(\s*\"?" + re.escape(var) + r"\"?[\s|,)]", text)
    return _line_of(text, m.start()) if m else None


def _assemble(label: str, text: str | None, names: list[str], states: dict, parents: dict,
              tables: dict) -> DiscreteNetwork:
    """Check a reader's dictionaries and build a validated, renormalised network."""
    def where(var: str) -> str:
        line = _cpt_line(text, var) if text is not None else None
        return f"{label} line {line}" if line else label

    names = [str(v) for v in names]
    declared = set(names)
    for v in tables:
        if str(v) not in declared:
            raise InputError(f"{where(str(v))}: probability table for undeclared variable {v!r}")
    for v in names:
        if v not in tables:
            raise InputError(f"{label}: variable {v!r} has no probability table "
                             "(file truncated?)")
        for p in parents.get(v, ()):
            if str(p) not in declared:
                raise InputError(f"{where(v)}: CPT of {v!r}: undeclared parent {p!r}")
        if not states.get(v):
            raise InputError(f"{label}: variable {v!r} has no states")
    st = {v: tuple(str(s) for s in states[v]) for v in names}
    pa = {v: tuple(str(p) for p in parents.get(v, ())) for v in names}
    cpts: dict[str, np.ndarray] = {}
    for v in names:
        shape = (len(st[v]),) + tuple(len(st[p]) for p in pa[v])
        raw = np.asarray(tables[v], dtype=float)
        if raw.size != int(np.prod(shape)):
            raise InputError(f"{where(v)}: CPT of {v!r} has {raw.size} entries, expected "
                             f"{int(np.prod(shape))} ({' x '.join(map(str, shape))})")
        table = raw.reshape(shape)
        if not np.all(np.isfinite(table)) or np.any(table < 0):
            raise InputError(f"{where(v)}: CPT of {v!r}: entries must be finite and >= 0")
        sums = table.sum(axis=0)
        dev = np.abs(sums - 1.0)
        if dev.size and float(dev.max()) > NORMALISATION_TOLERANCE:
            bad = float(sums.flat[int(np.argmax(dev))])
            raise InputError(f"{where(v)}: CPT of {v!r} sums to {bad:.6g}, expected 1 "
                             f"(tolerance {NORMALISATION_TOLERANCE:g})")
        cpts[v] = table / sums[np.newaxis, ...]
    order = topological_order(names, pa, label)
    net = DiscreteNetwork(variables=order, states=st, parents=pa, cpts=cpts, name=label)
    return net.validate(tolerance=1e-12)


_READER_CLASS: list = []


def _bif_reader_class():
    """pgmpy's BIFReader with its two pyparsing grammars built once per process.

    Building them (``Word(pp.unicode.alphanums ...)``) costs about a second per reader, more than
    parsing any bundled file; the grammars do not depend on the text, so they are shared."""
    if _READER_CLASS:
        return _READER_CLASS[0]
    from pgmpy.readwrite import BIFReader

    grammars: dict[str, tuple] = {}

    class _SharedGrammarBIFReader(BIFReader):
        def get_variable_grammar(self):
            if "variable" not in grammars:
                grammars["variable"] = BIFReader.get_variable_grammar(self)
            return grammars["variable"]

        def get_probability_grammar(self):
            if "probability" not in grammars:
                grammars["probability"] = BIFReader.get_probability_grammar(self)
            return grammars["probability"]

    _READER_CLASS.append(_SharedGrammarBIFReader)
    return _SharedGrammarBIFReader


def _read_bif_text(text: str, label: str) -> DiscreteNetwork:
    if not text.strip():
        raise InputError(f"{label}: file is empty; expected a BIF network")
    if "network" not in text and "variable" not in text:
        raise InputError(f"{label}: no 'network' or 'variable' block; expected a BIF network")
    _check_braces(text, label)
    try:
        reader = _bif_reader_class()(string=text)
        names, states = reader.variable_names, reader.variable_states
        parents, tables = reader.variable_parents, reader.variable_cpds
    except InputError:
        raise
    except Exception as exc:  # pgmpy/pyparsing/pandas raise many types on malformed text
        raise InputError(f"{label}: not a readable BIF file ({_first_line(exc)})") from exc
    if not names:
        raise InputError(f"{label}: no variables found; expected a BIF network")
    return _assemble(label, text, names, states, parents, tables)


def _read_xmlbif(path: Path, label: str) -> DiscreteNetwork:
    try:
        from pgmpy.readwrite import XMLBIFReader

        reader = XMLBIFReader(path=str(path))
        names, states = reader.variables, reader.variable_states
        parents, tables = reader.variable_parents, reader.variable_CPD
    except Exception as exc:
        raise InputError(f"{label}: not a readable XMLBIF file ({_first_line(exc)})") from exc
    return _assemble(label, None, names, states, parents, tables)


def _read_uai(path: Path, label: str) -> DiscreteNetwork:
    try:
        from pgmpy.readwrite import UAIReader

        reader = UAIReader(path=str(path))
        if reader.network_type != "BAYES":
            raise InputError(f"{label}: UAI network type {reader.network_type!r}; expected BAYES")
        model = reader.get_model()
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{label}: not a readable UAI file ({_first_line(exc)})") from exc
    net = from_pgmpy(model, name=label)
    return _assemble(label, None, list(net.variables), net.states, net.parents,
                     {v: net.cpts[v] for v in net.variables})


def read_network(source: str | Path) -> DiscreteNetwork:
    """Read a network file, or a bundled network by name, into a validated DiscreteNetwork.

    Parameters
    ----------
    source
        A path ending in ``.bif``, ``.bif.gz``, ``.xmlbif``, ``.xml`` or ``.uai``, or the name of a
        network bundled with pgmpy (``"asia"``).

    Raises
    ------
    InputError
        Missing, unreadable, truncated or inconsistent file; one line naming the file.

    Notes
    -----
    pgmpy's BIF grammar set-up costs about a second per file whatever its size; the tables are
    then taken from the reader's dictionaries and checked here (no pgmpy model is built).
    """
    text_source = str(source)
    path = Path(text_source)
    lower = path.name.lower()
    if not path.exists():
        if isinstance(source, str) and not lower.endswith(_SUFFIXES) and "/" not in text_source:
            path = bundled_path(text_source)
            with gzip.open(path, "rt", encoding="utf-8") as fh:
                return _read_bif_text(fh.read(), text_source)
        raise InputError(f"{text_source}: no such file")
    if path.is_dir():
        raise InputError(f"{text_source}: is a folder; expected a model file")
    label = text_source
    try:
        if lower.endswith(".bif.gz"):
            with gzip.open(path, "rt", encoding="utf-8") as fh:
                return _read_bif_text(fh.read(), label)
        if lower.endswith(".bif"):
            return _read_bif_text(path.read_text(encoding="utf-8"), label)
    except (OSError, UnicodeDecodeError, EOFError) as exc:
        raise InputError(f"{label}: cannot read ({_first_line(exc)})") from exc
    if lower.endswith((".xmlbif", ".xml")):
        return _read_xmlbif(path, label)
    if lower.endswith(".uai"):
        return _read_uai(path, label)
    raise InputError.at(label, None, "a file ending in .bif, .bif.gz, .xmlbif, .xml or .uai",
                        path.suffix or "no suffix")


def write_network(net: DiscreteNetwork, path: str | Path) -> None:
    """Write ``net`` as BIF (``.bif``; any other suffix but ``.xmlbif``/``.xml``) or XMLBIF,
    through pgmpy's writers. Floats are written at full precision, so a round trip is exact."""
    path = Path(path)
    model = to_pgmpy(net)
    lower = path.name.lower()
    try:
        if lower.endswith((".xmlbif", ".xml")):
            from pgmpy.readwrite import XMLBIFWriter

            XMLBIFWriter(model).write(str(path))
        else:
            from pgmpy.readwrite import BIFWriter

            BIFWriter(model).write(str(path))
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({_first_line(exc)})") from exc
