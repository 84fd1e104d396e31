"""Study files: a TOML file that states one permutation study, read into a :class:`Study`.

Schema (every section and key; unknown ones are an error that lists the allowed keys)::

    [study]
    title = "..."             # required
    nodes = "farms.csv"       # optional node table; paths are relative to the study file
    id_column = "farm"        # required when nodes is given
    col_nodes = "events.csv"  # two-mode only: column node table (optional)
    col_id_column = "event"   # required when col_nodes is given
    two_mode = true           # optional; implied by col_nodes; default false
    directed = true           # optional override; omitted = inferred by the engine
    inside_folder = true      # optional: refuse any path outside the study file's folder
    waves = ["2023", "2024"]  # optional: a panel; a network's file may then be one file per
                              # wave, file = { "2023" = "y23.csv", "2024" = "y24.csv" }
                              # (the response must be); one relabelling for every wave

    [response]
    name = "water"            # optional; default: the file's stem
    file = "water.csv"        # required: .csv (edge list or matrix), .npy, or file.h5:/dataset
                              # or one file per group: file = { a = "a.csv", b = "b.csv" }
                              # (keys are the values of the [test] groups column)
    format = "auto"           # optional: auto | edges | matrix
    missing = "NA"            # optional extra missing-value marker

    [[predictor]]             # one or more; each has a name and exactly one source key
    name = "kinship"
    file = "kinship.csv"      # a network file (format and missing allowed as in [response])
    # or one of: same | gap | sender | receiver | pair_sum = "<node-table column>"
    # or: reverse = "<name of the response or of a network predictor>"
    lag = 1                   # waves only, a predictor given per wave: the response at
                              # wave t goes with it at wave t - lag (first waves drop out)

    [test]
    kind = "regression"       # regression | correlation (correlation: exactly one predictor)
    model = "linear"          # regression only: linear | logistic
    scheme = "dsp"            # regression only: y | dsp | freedman-lane
    statistic = "t"           # regression only: t | coef | score (score: logistic only)
    method = "pearson"        # correlation only: pearson | spearman
    permutations = 10000      # integer >= 1
    seed = 20261202           # integer >= 0, optional
    alpha = 0.05              # 0 < alpha < 1
    exact = "auto"            # "auto" | true | false
    groups = "district"       # optional node-table column; relabelling stays within groups
    dyads = "within"          # within | all (only with groups; default within)
    jobs = 2                  # integer >= 1, or -1 for all cores; omitted = every core
    chunk_size = 256          # integer >= 1; omitted = the engine's choice
    stop = "none"             # none | besag-clifford | gandy (sequential stopping)
    stop_exceedances = 10     # besag-clifford only: h, exceedances that end a term
    stop_risk = 0.001         # gandy only: bound on the chance of a different decision
    ci = 0.95                 # regression only: level of the coefficient intervals (false: none)
    storage = "float64"       # float64 | float32: the engine's layers (sums stay float64;
                              # float32 halves memory and traffic; not for model = "logistic")

    [output]
    file = "water_run.h5"     # optional run file, relative to the study file

Node ids come from the node table (file order). Without one they are the union of the
labels in the response and predictor files, in order of first appearance (response first);
when no file carries labels (.npy, HDF5 only) they are ``"0" .. "n-1"``.

Two-mode data (rows and columns are different node sets) are declared with ``col_nodes``
or ``two_mode = true``. Derived predictors then use the row table for ``sender``, the
column table for ``receiver``, and both tables (a column of the same name) for ``same``,
``gap`` and ``pair_sum``.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..settings import DEFAULT_EXCEEDANCES, DEFAULT_RISK, STOP_RULES, STORAGE
from .dyadic import Dyadic, NodeDerived, Reverse, gap, pair_sum, receiver, reverse, same, sender
from . import memory
from .sparse import SparseNetwork
from .io import FORMATS, NodeTable, RawNetwork, align, collect_labels, float64_rows, \
    read_network, read_node_table, split_h5_path
from .labels import sorted_labels
from .waves import Waves

# Dense layers larger than this (bytes) send a study the sparse route can take there; a
# network file larger than this is read lazily (its values once the route is decided).
SPARSE_ABOVE = 1 << 30

__all__ = ["StudyInputs", "read_study"]

_SECTIONS: dict[str, tuple[str, ...]] = {
    "study": ("title", "nodes", "id_column", "col_nodes", "col_id_column", "two_mode",
              "directed", "inside_folder", "waves"),
    "response": ("name", "file", "format", "missing"),
    "predictor": ("name", "file", "format", "missing", "same", "gap", "sender", "receiver",
                  "pair_sum", "reverse", "lag"),
    "test": ("kind", "model", "scheme", "statistic", "method", "permutations", "seed", "alpha",
             "exact", "groups", "dyads", "jobs", "chunk_size", "stop", "stop_exceedances",
             "stop_risk", "ci", "storage"),
    "output": ("file",),
}
_DERIVED = {"same": same, "gap": gap, "sender": sender, "receiver": receiver,
            "pair_sum": pair_sum}
_SOURCES = ("file", *_DERIVED, "reverse")
_NUMERIC_KINDS = ("gap", "sender", "receiver", "pair_sum")
_CHOICES = {
    "kind": ("regression", "correlation"),
    "model": ("linear", "logistic"),
    "scheme": ("y", "dsp", "freedman-lane"),
    "statistic": ("t", "coef", "score"),
    "method": ("pearson", "spearman"),
    "dyads": ("within", "all"),
    "storage": STORAGE,
}
_REGRESSION_ONLY = ("model", "scheme", "statistic")
_DEFAULTS = {"kind": "regression", "model": "linear", "scheme": "dsp", "statistic": "t",
             "method": "pearson", "permutations": 10_000, "seed": None, "alpha": 0.05,
             "exact": "auto", "groups": None, "dyads": None, "jobs": None, "chunk_size": None}
_RESERVED_NAMES = ("intercept",)


class _Checker:
    """Type and range checks whose messages name the study file, section, key and value."""

    def __init__(self, shown: str) -> None:
        self.shown = shown

    def error(self, section: str, key: str, rule: str, value: Any = ...) -> InputError:
        got = "" if value is ... else f"; got {value!r}"
        return InputError(f"{self.shown} {section} {key}: {rule}{got}")

    def keys(self, section: str, table: Any, allowed: tuple[str, ...]) -> dict:
        if not isinstance(table, dict):
            raise InputError(f"{self.shown} {section}: must be a table of keys; "
                             f"got {type(table).__name__}")
        for key in table:
            if key not in allowed:
                raise InputError(f"{self.shown} {section} {key}: unknown key; allowed keys: "
                                 + ", ".join(allowed))
        return table

    def text(self, section: str, table: dict, key: str, *, required: bool = False,
             choices: tuple[str, ...] | None = None, default: str | None = None) -> str | None:
        if key not in table:
            if required:
                raise self.error(section, key, "is required")
            return default
        value = table[key]
        if not isinstance(value, str):
            raise self.error(section, key, "must be a string", value)
        if choices is not None and value not in choices:
            raise self.error(section, key, f"must be one of {', '.join(choices)}", value)
        if choices is None and not value.strip():
            raise self.error(section, key, "must not be empty", value)
        return value

    def flag(self, section: str, table: dict, key: str, default: bool | None) -> bool | None:
        if key not in table:
            return default
        value = table[key]
        if not isinstance(value, bool):
            raise self.error(section, key, "must be true or false", value)
        return value

    def integer(self, section: str, table: dict, key: str, default: int | None, *,
                minimum: int, also: int | None = None) -> int | None:
        if key not in table:
            return default
        return _integer(table[key], minimum, also,
                        lambda rule, v: self.error(section, key, rule, v))


def _integer(value: Any, minimum: int, also: int | None, error) -> int:
    rule = f"must be an integer >= {minimum}" + ("" if also is None else f" or {also}")
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise error(rule, value)
    if value < minimum and value != also:
        raise error(rule, value)
    return int(value)


def _arg_error(name: str):
    return lambda rule, value: InputError(f"`{name}` {rule}; got {value!r}")


# --------------------------------------------------------------------------- validation

def _validate(doc: dict, check: _Checker) -> dict:
    """Check every key's type and range, fill defaults; returns the spec dict."""
    for key in doc:
        if key not in _SECTIONS:
            raise InputError(f"{check.shown}: unknown section [{key}]; allowed sections: "
                             + ", ".join(_SECTIONS))
    for required in ("study", "response", "predictor"):
        if required not in doc:
            shown = "[[predictor]]" if required == "predictor" else f"[{required}]"
            raise InputError(f"{check.shown}: section {shown} is required")

    st = check.keys("[study]", doc["study"], _SECTIONS["study"])
    study = {"title": check.text("[study]", st, "title", required=True)}
    for key in ("nodes", "id_column", "col_nodes", "col_id_column"):
        study[key] = check.text("[study]", st, key)
    for table_key, id_key in (("nodes", "id_column"), ("col_nodes", "col_id_column")):
        if study[table_key] is not None and study[id_key] is None:
            raise check.error("[study]", id_key, f"is required when {table_key} is given")
        if study[id_key] is not None and study[table_key] is None:
            raise check.error("[study]", id_key, f"needs {table_key} (a node table)",
                              study[id_key])
    two_mode = check.flag("[study]", st, "two_mode", None)
    if two_mode is False and study["col_nodes"] is not None:
        raise check.error("[study]", "two_mode", "must be true when col_nodes is given", False)
    study["two_mode"] = bool(two_mode or study["col_nodes"] is not None)
    study["directed"] = check.flag("[study]", st, "directed", None)
    study["inside_folder"] = bool(check.flag("[study]", st, "inside_folder", False))
    if study["two_mode"] and study["directed"] is not None:
        raise check.error("[study]", "directed", "applies to one-mode data only (this study "
                          "is two-mode)", study["directed"])

    waves = _waves_entry(st, check)
    if waves is not None:  # a panel (absent from the spec otherwise)
        study["waves"] = waves

    rs = check.keys("[response]", doc["response"], _SECTIONS["response"])
    response = _network_entry("[response]", rs, check)
    if "name" not in rs:
        response["name"] = _file_stem(response["file"])
    else:
        response["name"] = check.text("[response]", rs, "name")

    preds = doc["predictor"]
    if isinstance(preds, dict):
        raise InputError(f"{check.shown} [predictor]: write each predictor as [[predictor]] "
                         "(an array of tables)")
    if not isinstance(preds, list) or not preds:
        raise InputError(f"{check.shown}: at least one [[predictor]] is required")
    predictors = [_predictor_entry(k + 1, p, check) for k, p in enumerate(preds)]
    _check_names(response, predictors, check)

    te = check.keys("[test]", doc.get("test", {}), _SECTIONS["test"])
    test = _test_entry(te, check, len(predictors))
    if study.get("waves") is not None:
        _check_wave_files(study["waves"], response, predictors, test, check)
    elif any("lag" in p for p in predictors):
        p = next(p for p in predictors if "lag" in p)
        raise check.error(p["section"], "lag", "needs [study] waves", p["lag"])

    out = check.keys("[output]", doc.get("output", {}), _SECTIONS["output"])
    output = {"file": check.text("[output]", out, "file")}

    for p in predictors:
        if "reverse" in p and study["two_mode"]:
            raise check.error(p["section"], "reverse", "applies to one-mode data only (this "
                              "study is two-mode)", p["reverse"])
    if test["groups"] is not None and study["nodes"] is None:
        raise check.error("[test]", "groups", "needs [study] nodes (a node table)",
                          test["groups"])
    for p in predictors:
        kind = p["kind"]
        if kind in _DERIVED and study["nodes"] is None and (kind != "receiver"
                                                            or not study["two_mode"]):
            raise check.error(p["section"], kind, "needs [study] nodes (a node table)", p[kind])
        if study["two_mode"] and kind in _DERIVED and kind != "sender" \
                and study["col_nodes"] is None:
            raise check.error(p["section"], kind, "needs [study] col_nodes (the column node "
                              "table) for two-mode data", p[kind])
    return {"study": study, "response": response,
            "predictor": [{k: v for k, v in p.items() if k not in ("section", "kind")}
                          for p in predictors],
            "test": test, "output": output}


def _network_entry(section: str, table: dict, check: _Checker) -> dict:
    files = table.get("file")
    if isinstance(files, dict):  # one file per group: { group = "file.csv", ... }
        if not files:
            raise check.error(section, "file", "needs at least one group = file entry", files)
        for group, name in files.items():
            if not isinstance(name, str) or not name.strip():
                raise check.error(section, f"file.{group}", "must be a file name", name)
        file: Any = dict(files)
    else:
        file = check.text(section, table, "file", required=True)
    return {"file": file,
            "format": check.text(section, table, "format", choices=FORMATS, default="auto"),
            "missing": check.text(section, table, "missing")}


def _waves_entry(st: dict, check: _Checker) -> list[str] | None:
    """``[study] waves``: the names of the waves of a panel, in time order, or None."""
    if "waves" not in st:
        return None
    waves = st["waves"]
    if not isinstance(waves, list) or not waves or not all(
            isinstance(w, (str, int)) and not isinstance(w, bool) for w in waves):
        raise check.error("[study]", "waves", "must be a list of wave names (text)", waves)
    names = [str(w) for w in waves]
    if len(set(names)) != len(names):
        raise check.error("[study]", "waves", "must name each wave once", waves)
    return names


def _check_wave_files(waves: list[str], response: dict, predictors: list[dict], test: dict,
                      check: _Checker) -> None:
    """With waves, a file table is keyed by wave (every wave, no other key); the response
    is given per wave; a lag needs a predictor given per wave and leaves a wave."""
    if test["kind"] != "regression":
        raise check.error("[test]", "kind", "must be regression with [study] waves",
                          test["kind"])
    for section, entry in [("[response]", response)] + [(p["section"], p) for p in predictors]:
        files = entry.get("file")
        if isinstance(files, dict):
            unknown = [k for k in files if k not in waves]
            absent = [w for w in waves if w not in files]
            if unknown or absent:
                raise check.error(section, "file", "needs one file per wave of [study] waves "
                                  f"({', '.join(waves)}); "
                                  + (f"not a wave: {unknown[0]!r}" if unknown else
                                     f"no file for wave {absent[0]!r}"), sorted(files))
        elif section == "[response]":
            raise check.error(section, "file", "needs one file per wave with [study] waves: "
                              'file = { "' + waves[0] + '" = "...", ... }', files)
        lag = entry.get("lag", 0)
        if lag and not isinstance(files, dict):
            raise check.error(section, "lag", "needs the predictor given per wave "
                              "(file = { wave = file, ... })", lag)
        if lag >= len(waves):
            raise check.error(section, "lag", f"must be below the number of waves "
                              f"({len(waves)})", lag)


def _predictor_entry(number: int, table: Any, check: _Checker) -> dict:
    section = f"[[predictor]] #{number}"
    table = check.keys(section, table, _SECTIONS["predictor"])
    name = check.text(section, table, "name", required=True)
    given = [k for k in _SOURCES if k in table]
    if len(given) != 1:
        raise InputError(f"{check.shown} {section} ({name!r}): needs exactly one of "
                         + ", ".join(_SOURCES) + "; got "
                         + (", ".join(given) if given else "none"))
    kind = given[0]
    entry: dict[str, Any] = {"section": section, "kind": kind, "name": name}
    if "lag" in table:
        entry["lag"] = check.integer(section, table, "lag", 0, minimum=0)
    if kind == "file":
        entry.update(_network_entry(section, table, check))
    else:
        for key in ("format", "missing"):
            if key in table:
                raise check.error(section, key, "applies to a network file only (not to "
                                  f"{kind})", table[key])
        entry[kind] = check.text(section, table, kind)
    return entry


def _check_names(response: dict, predictors: list[dict], check: _Checker) -> None:
    seen = {response["name"]: "[response]"}
    for p in predictors:
        name = p["name"]
        if name in _RESERVED_NAMES:
            raise check.error(p["section"], "name", "is reserved for the model's intercept "
                              "term; choose another", name)
        if name in seen:
            raise check.error(p["section"], "name", f"is already used by {seen[name]}", name)
        seen[name] = p["section"]
    networks = {response["name"]} | {p["name"] for p in predictors if p["kind"] == "file"}
    for p in predictors:
        if p["kind"] == "reverse" and p["reverse"] not in networks:
            raise check.error(p["section"], "reverse", "must name the response or a network "
                              f"predictor (one of {', '.join(sorted(networks))})", p["reverse"])


def _test_entry(te: dict, check: _Checker, n_predictors: int) -> dict:
    sec = "[test]"
    kind = check.text(sec, te, "kind", choices=_CHOICES["kind"], default=_DEFAULTS["kind"])
    test: dict[str, Any] = {"kind": kind}
    for key in ("model", "scheme", "statistic", "method"):
        regression_key = key in _REGRESSION_ONLY
        if key in te and regression_key != (kind == "regression"):
            raise check.error(sec, key, f"applies to kind = "
                              f"{'regression' if regression_key else 'correlation'} only "
                              f"(kind is {kind})", te[key])
        wanted = regression_key == (kind == "regression")
        test[key] = (check.text(sec, te, key, choices=_CHOICES[key], default=_DEFAULTS[key])
                     if wanted else None)
    if test["statistic"] == "score" and test["model"] != "logistic":
        raise check.error(sec, "statistic", 'score applies to model = "logistic" only',
                          "score")
    if kind == "correlation" and n_predictors != 1:
        raise check.error(sec, "kind", f"correlation needs exactly one [[predictor]] "
                          f"(found {n_predictors})", kind)
    test["permutations"] = check.integer(sec, te, "permutations", _DEFAULTS["permutations"],
                                         minimum=1)
    test["seed"] = check.integer(sec, te, "seed", None, minimum=0)
    alpha = te.get("alpha", _DEFAULTS["alpha"])
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
        raise check.error(sec, "alpha", "must be a number with 0 < alpha < 1", alpha)
    test["alpha"] = float(alpha)
    exact = te.get("exact", _DEFAULTS["exact"])
    if not (isinstance(exact, bool) or exact == "auto"):
        raise check.error(sec, "exact", 'must be "auto", true or false', exact)
    test["exact"] = exact
    test["groups"] = check.text(sec, te, "groups")
    if "dyads" in te and test["groups"] is None:
        raise check.error(sec, "dyads", "applies only with groups", te["dyads"])
    test["dyads"] = (check.text(sec, te, "dyads", choices=_CHOICES["dyads"], default="within")
                     if test["groups"] is not None else None)
    test["jobs"] = check.integer(sec, te, "jobs", _DEFAULTS["jobs"], minimum=1, also=-1)
    test["chunk_size"] = check.integer(sec, te, "chunk_size", _DEFAULTS["chunk_size"],
                                       minimum=1)
    _stop_entry(te, test, check)
    test["ci"] = 0.95 if kind == "regression" else None
    if "ci" in te:
        if kind != "regression":
            raise check.error(sec, "ci", "applies to kind = regression only (kind is "
                              f"{kind})", te["ci"])
        ci = te["ci"]
        if ci is False:
            test["ci"] = None
        elif isinstance(ci, bool) or not isinstance(ci, (int, float)) or not 0 < ci < 1:
            raise check.error(sec, "ci", "must be a level with 0 < ci < 1 (0.95 for 95% "
                              "intervals), or false for none", ci)
        else:
            test["ci"] = float(ci)
    test["storage"] = check.text(sec, te, "storage", choices=STORAGE, default="float64")
    if test["storage"] != "float64" and test["model"] == "logistic":
        raise check.error(sec, "storage", 'must be "float64" for model = "logistic"',
                          test["storage"])
    return test


def _stop_entry(te: dict, test: dict, check: _Checker) -> None:
    """stop, stop_exceedances, stop_risk (dyadperm.precision); keys of another rule are errors."""
    sec = "[test]"
    rule = check.text(sec, te, "stop", choices=STOP_RULES, default="none")
    test["stop"] = rule
    for key, owner in (("stop_exceedances", "besag-clifford"), ("stop_risk", "gandy")):
        if key in te and rule != owner:
            raise check.error(sec, key, f"applies to stop = {owner} only (stop is {rule})",
                              te[key])
    test["stop_exceedances"] = (check.integer(sec, te, "stop_exceedances", DEFAULT_EXCEEDANCES,
                                              minimum=1)
                                if rule == "besag-clifford" else None)
    risk = te.get("stop_risk", DEFAULT_RISK)
    if rule == "gandy" and (isinstance(risk, bool) or not isinstance(risk, (int, float))
                            or not 0 < risk < 0.5):
        raise check.error(sec, "stop_risk", "must be a number with 0 < stop_risk < 0.5", risk)
    test["stop_risk"] = float(risk) if rule == "gandy" else None


def _file_stem(file: str) -> str:
    h5 = split_h5_path(file)
    return Path(h5[0] if h5 is not None else file).stem


# --------------------------------------------------------------------------- Study

@dataclass(frozen=True)
class Route:
    """Which route a study takes and why (``_Loader.route``; ``dyadperm check`` prints it).

    sparse : bool
        The networks are kept as edge lists (the sparse route).
    dense_bytes : int
        Memory the dense route would need (``inputs.memory``: the networks built as n x m
        arrays, the layer stack, the masks).
    available : int or None
        Memory available when the study was read (None: unknown).
    blocker : str or None
        Why the sparse route cannot take the study (None: it can).
    """

    sparse: bool
    dense_bytes: int
    available: int | None
    blocker: str | None


class StudyInputs:
    """A validated study: its inputs read and placed on one node order (``dyadperm.Study``
    adds ``run``).

    Attributes
    ----------
    path : Path
        The study file (absolute).
    text : str
        The study file's raw text, kept for provenance.
    spec : dict
        The validated settings with defaults filled: sections ``study``, ``response``,
        ``predictor`` (a list), ``test`` and ``output``; keys that do not apply are None.
    title : str
    node_ids : tuple of str
        Node order (row nodes for two-mode data): the node table's order (or the labels'
        first appearance in the files), except when the networks load in place
        (``layers_in_place``, no groups): then the engine's order, by label.
    col_node_ids : tuple of str or None
        Column node order for two-mode data.
    node_table, col_node_table : NodeTable or None
    response : Dyadic
    predictors : dict of str to Dyadic, NodeDerived or Reverse
        In file order.
    groups : ndarray or None
        Group of each node (node order) from the ``groups`` column.
    notes : list of str
        Things the user should know that are not errors (self-loops ignored, ...).
    output : Path or None
        Run file from ``[output] file``.
    layers_in_place : bool
        The networks were loaded as the layers of the engine's stack (``.npy``/HDF5 files
        of a linear regression or a Pearson correlation): a run standardises them in place,
        so the data are held once; a later run reads the network files again.
    route : Route or None
        Which route the study takes (sparse or dense), why the sparse route cannot take it
        (if so) and the memory the dense route would need.
    """

    def __init__(self, *, path: Path, text: str, spec: dict, node_ids: tuple[str, ...],
                 col_node_ids: tuple[str, ...] | None, node_table: NodeTable | None,
                 col_node_table: NodeTable | None, response: Dyadic,
                 predictors: dict[str, Dyadic | NodeDerived | Reverse],
                 groups: np.ndarray | None, notes: list[str], output: Path | None,
                 layers_in_place: bool = False, reload: Any = None,
                 route: Route | None = None) -> None:
        self.path = path
        self.text = text
        self.spec = spec
        self.title: str = spec["study"]["title"]
        self.node_ids = node_ids
        self.col_node_ids = col_node_ids
        self.node_table = node_table
        self.col_node_table = col_node_table
        self._response = response
        self._predictors = predictors
        self.groups = groups
        self.notes = notes
        self.output = output
        # the networks are layers of the engine's stack: the first run may overwrite them
        self.layers_in_place = layers_in_place
        self._spent = False
        self._reload = reload
        self.route = route

    def _fresh(self) -> None:
        """Read the network files again when a run has standardised the layers in place."""
        if self._spent:
            # let the spent layers go first, so the networks are never held twice
            self._response, self._predictors = None, {}  # type: ignore[assignment]
            fresh = self._reload()
            self._response, self._predictors = fresh.response, fresh.predictors
            self._spent = False

    @property
    def response(self) -> Dyadic:
        """The response network (read again from its file after an in-place run)."""
        self._fresh()
        return self._response

    @property
    def predictors(self) -> dict[str, Dyadic | NodeDerived | Reverse]:
        """The predictors by name, in model order (read again after an in-place run)."""
        self._fresh()
        return self._predictors

    def __repr__(self) -> str:
        shape = f"{len(self.node_ids)}" + (f" x {len(self.col_node_ids)}"
                                           if self.col_node_ids is not None else "")
        return (f"Study({self.title!r}, nodes={shape}, response={self.response.name!r}, "
                f"predictors={list(self.predictors)!r}, kind={self.spec['test']['kind']!r})")


# --------------------------------------------------------------------------- loading

def read_study(path: str | Path, cls: type = StudyInputs, *, storage: str | None = None) -> Any:
    """Read, validate and load a study file into ``cls`` (a StudyInputs class).

    Parameters
    ----------
    path : str or Path
        The TOML study file. Paths inside it are relative to its folder.
    storage : {"float64", "float32"}, optional
        Overrides ``[test] storage`` (the command line's ``--storage``); it decides how
        ``.npy``/HDF5 networks are loaded, so it is given here, not to ``run``.

    Returns
    -------
    StudyInputs (of class ``cls``)
        Settings validated, node tables and network files read and aligned on one node
        order, derived predictors built from node-table columns.

    Raises
    ------
    InputError
        Missing or unreadable study file; invalid TOML (the parser's line and column); an
        unknown section or key (the allowed ones listed); a value of the wrong type or
        range (study file, section, key, rule and value named); a file that does not exist
        (key and resolved path named); any error of the readers in :mod:`dyadperm.io`.
    """
    path = Path(path).resolve()
    shown = path.name
    if not path.is_file():
        raise InputError(f"{path}: no such study file")
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"{shown}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{shown}: not valid TOML: {exc}") from None
    check = _Checker(shown)
    spec = _validate(doc, check)
    if storage is not None:
        if storage not in STORAGE:
            raise InputError(f"storage must be one of {', '.join(STORAGE)}; got {storage!r}")
        if storage != "float64" and spec["test"]["model"] == "logistic":
            raise InputError(f"storage {storage!r}: {shown} fits model = \"logistic\", which "
                             "needs float64")
        spec["test"]["storage"] = storage
    return _Loader(path, check, spec, cls).load(text)


class _Loader:
    """Reads the files a validated spec names and builds the Study."""

    def __init__(self, path: Path, check: _Checker, spec: dict, cls: type) -> None:
        self.cls = cls
        self.base = path.parent
        self.path = path
        self.check = check
        self.spec = spec
        self.notes: list[str] = []

    def resolve(self, section: str, key: str, file: str) -> Path | str:
        """Absolute path of ``file`` (``file.h5:/dataset`` keeps its dataset part)."""
        h5 = split_h5_path(file)
        on_disk = Path(h5[0] if h5 is not None else file)
        full = on_disk if on_disk.is_absolute() else (self.base / on_disk)
        if self.spec["study"]["inside_folder"] and \
                not full.resolve().is_relative_to(self.base.resolve()):
            raise self.check.error(section, key, "is outside the study file's folder "
                                   "([study] inside_folder = true)", file)
        if not full.is_file():
            raise self.check.error(section, key, f"no such file {full}", file)
        return f"{full}:{h5[1]}" if h5 is not None else full

    def table(self, key: str, id_key: str) -> NodeTable | None:
        sd = self.spec["study"]
        if sd[key] is None:
            return None
        return read_node_table(self.resolve("[study]", key, sd[key]), sd[id_key])

    def load(self, text: str) -> Any:
        sd, test = self.spec["study"], self.spec["test"]
        nodes, col_nodes = self.table("nodes", "id_column"), self.table("col_nodes",
                                                                          "col_id_column")
        entries = [("[response]", self.spec["response"])] + [
            (f"[[predictor]] #{k + 1}", p) for k, p in enumerate(self.spec["predictor"])]
        raws: dict[str, tuple[RawNetwork, str]] = {}
        grouped: dict[str, dict[str, tuple[RawNetwork, str]]] = {}
        waved: dict[str, list[tuple[RawNetwork, str]]] = {}
        layout = self.layer_layout(entries)
        for section, entry in entries:
            if "file" not in entry:
                continue
            if isinstance(entry["file"], dict) and sd.get("waves") is not None:
                waved[entry["name"]] = [
                    (read_network(self.resolve(section, f"file.{w}", entry["file"][w]),
                                  fmt=entry["format"], missing=entry["missing"]),
                     entry["file"][w]) for w in sd["waves"]]
                continue
            if isinstance(entry["file"], dict):
                grouped[entry["name"]] = {
                    group: (read_network(self.resolve(section, f"file.{group}", file),
                                         fmt=entry["format"], missing=entry["missing"]), file)
                    for group, file in entry["file"].items()}
                continue
            where = self.resolve(section, "file", entry["file"])
            # a large .npy/HDF5 file is read lazily, so the route can be decided (and a
            # study too large for the dense route refused) before its values are loaded
            raws[entry["name"]] = (read_network(where, fmt=entry["format"],
                                                missing=entry["missing"],
                                                lazy=layout is not None or _large(where)),
                                   entry["file"])
        rows, cols = self.node_ids(nodes, col_nodes, [r for r, _ in raws.values()] + [
            r for parts in grouped.values() for r, _ in parts.values()] + [
            r for parts in waved.values() for r, _ in parts])

        networks: dict[str, Any] = {}
        route = self.route(entries, raws, {**grouped, **waved}, rows, cols, nodes, col_nodes,
                           layout)
        sparse = route.sparse
        slots = {} if sparse or layout is None else self.layer_slots(layout, rows, cols)
        block_ids = None
        if slots and test["groups"] is None:
            # load the layers straight in the engine's node order (by label), so that it
            # can use them as they are instead of copying them into its own order
            ordered = (sorted_labels(rows), None if cols is None else sorted_labels(cols))
            if ordered != (rows, cols):
                block_ids, (rows, cols) = (rows, cols), ordered
        for name, (raw, file) in raws.items():
            if sparse:
                networks[name] = self.sparse_network(name, raw, file, rows, cols)
                continue
            values, notes = align(raw, rows, cols, directed=sd["directed"], source=file,
                                  row_ids_source=sd["nodes"], col_ids_source=sd["col_nodes"],
                                  out=slots.get(name), block_ids=block_ids)
            self.notes.extend(notes)
            # float32 layers: the observed fit reads the float64 values from the file again
            exact = (None if values.dtype == np.float64
                     else float64_rows(raw, rows, cols, block_ids=block_ids))
            networks[name] = Dyadic(values, rows, cols, sd["directed"], None, name, exact)

        for name, parts in grouped.items():
            networks[name] = self.assemble_groups(name, parts, nodes, rows)
        lags = {p["name"]: p.get("lag", 0) for p in self.spec["predictor"]}
        for name, parts in waved.items():
            networks[name] = self.assemble_waves(name, parts, rows, lags.get(name, 0))

        predictors: dict[str, Dyadic | NodeDerived | Reverse] = {}
        for section, p in entries[1:]:
            name = p["name"]
            if "file" in p:
                predictors[name] = networks[name]
            elif "reverse" in p:
                predictors[name] = reverse(networks[p["reverse"]], name=name)
            else:
                predictors[name] = self.derived(section, p, nodes, col_nodes, len(rows))
        groups = None
        if test["groups"] is not None:
            groups = self.attribute("[test]", "groups", nodes, test["groups"], need_all=True)
        output = None
        if self.spec["output"]["file"] is not None:
            output = Path(self.spec["output"]["file"])
            output = output if output.is_absolute() else self.base / output
        return self.cls(path=self.path, text=text, spec=self.spec, node_ids=rows,
                     col_node_ids=cols, node_table=nodes, col_node_table=col_nodes,
                     response=networks[self.spec["response"]["name"]], predictors=predictors,
                     groups=groups, notes=self.notes, output=output,
                     layers_in_place=bool(slots),
                     reload=lambda: _Loader(self.path, self.check, self.spec, self.cls).load(text),
                     route=route)

    def layer_layout(self, entries: list) -> list[list[str]] | None:
        """Network names per layer array when the study can load into the engine's layers.

        A linear regression or a Pearson correlation whose networks are each one .npy or
        HDF5 file (no derived or reverse predictors, no file per group) loads every file
        straight into an (n, m, L) array laid out as the engine's layer stack:
        [predictors..., response] for dsp and freedman-lane, [response] and
        [predictors...] for y and correlations. The run then standardises those arrays in
        place (``overwrite_inputs=True``), so the data are held once, never twice. None:
        load as usual.
        """
        test = self.spec["test"]
        if test["kind"] == "correlation":
            if test["method"] != "pearson":
                return None  # Spearman ranks into new arrays anyway
        elif test["model"] != "linear":
            return None
        for _, entry in entries:
            file = entry.get("file")
            if not isinstance(file, str) or entry.get("format", "auto") != "auto":
                return None
            if split_h5_path(file) is None and not file.lower().endswith(".npy"):
                return None
        names = [e["name"] for _, e in entries]
        response, xs = names[0], names[1:]
        if test["kind"] == "correlation" or test["scheme"] == "y":
            return [[response], xs]
        return [xs + [response]]

    def layer_slots(self, layout: list[list[str]], rows: tuple[str, ...],
                    cols: tuple[str, ...] | None) -> dict[str, np.ndarray]:
        """One (n, m) view per network into the layer arrays of ``layout``, in the
        ``[test] storage`` dtype (float32 layers keep no float64 copy: the networks'
        ``Dyadic.source`` reads the files again for the observed fit)."""
        n, m = len(rows), len(cols) if cols is not None else len(rows)
        slots = {}
        for names in layout:
            base = np.empty((n, m, len(names)), dtype=self.spec["test"]["storage"])
            for pos, name in enumerate(names):
                slots[name] = base[:, :, pos]
        return slots

    def assemble_groups(self, name: str, parts: dict, nodes: NodeTable | None,
                        rows: tuple[str, ...]) -> Dyadic:
        """One network from one file per group (several separate networks, stacked).

        Each file holds the ties among the nodes of its group (the ``[test] groups`` column);
        dyads between groups do not exist and never enter (``dyads = "within"``).
        """
        test, sd = self.spec["test"], self.spec["study"]
        section = "[response]" if name == self.spec["response"]["name"] else "[[predictor]]"
        if nodes is None or test["groups"] is None:
            raise self.check.error(section, "file", "one file per group needs [study] nodes "
                                   "and [test] groups", sorted(parts))
        if test["dyads"] == "all":
            raise self.check.error("[test]", "dyads", "one file per group gives the dyads "
                                   "within groups only; use dyads = \"within\"", "all")
        if sd["two_mode"]:
            raise self.check.error(section, "file", "one file per group is for one-mode "
                                   "networks", sorted(parts))
        labels = np.array([_group_key(v) for v in self.attribute(
            "[test]", "groups", nodes, test["groups"], need_all=True)])
        absent = sorted(set(labels) - set(parts))
        if absent:
            raise self.check.error(section, f"file.{absent[0]}", "no file for this group "
                                   f"(groups found in {sd['nodes']}: "
                                   f"{', '.join(sorted(set(labels)))})", None)
        full = np.zeros((len(rows), len(rows)))
        for group, (raw, file) in parts.items():
            members = np.flatnonzero(labels == group)
            if members.size == 0:
                raise self.check.error(section, f"file.{group}", f"no node of group {group!r} "
                                       f"in {sd['nodes']}", file)
            values, notes = align(raw, tuple(rows[i] for i in members), None,
                                  directed=sd["directed"], source=file,
                                  row_ids_source=f"group {group} of {sd['nodes']}")
            self.notes.extend(notes)
            full[np.ix_(members, members)] = values
        return Dyadic(full, rows, None, sd["directed"], None, name)

    def assemble_waves(self, name: str, parts: list, rows: tuple[str, ...], lag: int) -> Waves:
        """One network per wave on the node order, as a Waves. A labelled matrix file
        marks the nodes it does not list as absent at its wave (their dyads missing
        there); an edge list lists ties, so every node is present at every wave."""
        sd = self.spec["study"]
        mats = []
        for wave, (raw, file) in zip(sd["waves"], parts):
            values, notes = align(raw, rows, None, directed=sd["directed"], source=file,
                                  row_ids_source=sd["nodes"])
            if not raw.is_edges and raw.row_labels is not None:
                listed = set(raw.row_labels) | set(raw.col_labels or ())
                absent = [k for k, lab in enumerate(rows) if lab not in listed]
                if absent:
                    values = np.array(values, dtype=np.float64)
                    values[absent, :] = np.nan
                    values[:, absent] = np.nan
                    notes = [note for note in notes if "taken as no tie" not in note]
                    notes.append(f"{file}: {len(absent)} node(s) absent at wave {wave} (their "
                                 "dyads missing there): "
                                 + ", ".join(repr(rows[k]) for k in absent[:5])
                                 + (", ..." if len(absent) > 5 else ""))
            self.notes.extend(notes)
            mats.append(Dyadic(values, rows, None, sd["directed"], None, name))
        return Waves(mats, names=sd["waves"], lag=lag, name=name)

    def route(self, entries: list, raws: dict, grouped: dict, rows: tuple[str, ...], cols,
              nodes: NodeTable | None, col_nodes: NodeTable | None, layout) -> Route:
        """Which route the study takes: keep its edge lists as edges (sparse) or build n x m
        arrays (dense). Decided before any network is placed on the node order.

        Sparse when the sparse route can take the study (``sparse_blocker``) and the dense
        layers would take more than ``SPARSE_ABOVE`` bytes, or would not fit in the memory
        available. Smaller studies stay dense (the same numbers to about 1e-13, and every
        route and feature works there). A study that only the dense route can take and
        whose arrays do not fit in memory is refused here, in one line naming what keeps it
        off the sparse route and the memory the dense route would need.
        """
        test = self.spec["test"]
        k = len(self.spec["predictor"])
        n = len(rows)
        m = n if cols is None else len(cols)
        built = (0 if layout is not None else len(raws)) + len(grouped) + sum(
            1 for p in self.spec["predictor"] if "file" not in p)
        if test["groups"] is not None:
            built += k + 1  # reordered copies
        per_term = 3 if test["kind"] == "regression" and test["model"] == "logistic" else 1
        need = memory.dense_bytes(n, m, arrays=built, layers=per_term * (k + 1),
                                  itemsize=np.dtype(test["storage"]).itemsize)
        blocker = self.sparse_blocker(entries, raws, grouped, nodes, col_nodes)
        fits, avail = memory.fits(need)
        if blocker is None and (8.0 * n * m * (k + 1) > SPARSE_ABOVE or not fits):
            return Route(True, need, avail, None)
        if not fits:
            size = f"{n:,} nodes" if cols is None else f"{n:,} x {m:,} nodes"
            raise InputError(f"{self.check.shown}: {blocker}; the dense route would need "
                             f"{memory.gib(need)} of memory for {size} ({k + 1} networks as "
                             f"n x n arrays), more than the {memory.gib(avail)} available")
        return Route(False, need, avail, blocker)

    def sparse_blocker(self, entries: list, raws: dict, grouped: dict,
                       nodes: NodeTable | None, col_nodes: NodeTable | None) -> str | None:
        """What keeps the study off the sparse route (the first thing found), or None.

        The sparse route takes a linear regression (any scheme) or a correlation whose
        network files are all complete edge lists (one file per network) and whose
        derived predictors have a value for every node; one-mode or two-mode, with or
        without groups.
        """
        test = self.spec["test"]
        if self.spec["study"].get("waves") is not None:
            return "a study with [study] waves runs on dense arrays only"
        if test["kind"] == "regression" and test["model"] != "linear":
            return f'model = "{test["model"]}" runs on dense arrays only'
        for section, entry in entries:
            name = entry["name"]
            if name in grouped:
                return (f"{section} {name!r} is given as one file per group, which the "
                        "sparse route does not read")
            if name in raws:
                raw, file = raws[name]
                if not raw.is_edges:
                    return (f"{section} {name!r} ({file}) is a dense matrix file; the sparse "
                            "route takes edge lists and derived predictors")
                gaps = np.flatnonzero(np.isnan(raw.weights))
                if gaps.size:
                    return (f"{section} {name!r} ({file}) has a missing value at line "
                            f"{int(raw.lines[gaps[0]])}; the sparse route takes complete "
                            "edge lists")
                continue
            kind = next((key for key in _DERIVED if key in entry), None)
            if kind is None:
                continue
            if test["kind"] == "correlation" and test["method"] == "spearman" \
                    and kind in ("gap", "pair_sum"):
                return (f"{section} {name!r}: Spearman ranks of a {kind} predictor need "
                        "every one of its n x n dyad values")
            tables = [(nodes, kind != "receiver" or not self.spec["study"]["two_mode"]),
                      (col_nodes, kind != "sender")]
            for table, used in tables:
                if not used or table is None or entry[kind] not in table.columns:
                    continue
                values = table.columns[entry[kind]]
                empty = np.isnan(values) if values.dtype.kind == "f" else values == ""
                if empty.any():
                    line = table.lines[int(np.flatnonzero(empty)[0])]
                    return (f"{section} {name!r}: {table.path.name} column {entry[kind]!r} "
                            f"has no value at line {line}; the sparse route takes no "
                            "missing values")
        return None

    def sparse_network(self, name: str, raw: RawNetwork, file: str, rows: tuple[str, ...],
                       cols: tuple[str, ...] | None) -> SparseNetwork:
        """A SparseNetwork from an edge list, labels placed on the node order (two-mode:
        sources on the row nodes, targets on the column nodes)."""
        sd = self.spec["study"]
        row_from = f" (not in {sd['nodes']})" if sd["nodes"] else ""
        col_from = f" (not in {sd['col_nodes']})" if sd["col_nodes"] else ""
        i = _label_positions(raw, raw.sources, rows, file, row_from)
        j = _label_positions(raw, raw.targets, rows if cols is None else cols, file,
                             row_from if cols is None else col_from)
        lines = raw.lines
        if cols is None:
            loop = i == j
            if loop.any():
                self.notes.append(f"{file}: {int(loop.sum())} self-loop(s) ignored (line "
                                  + ", ".join(str(x) for x in lines[loop][:5].tolist())
                                  + (", ..." if loop.sum() > 5 else "") + ")")
        m = len(rows if cols is None else cols)
        key = i * max(m, 1) + j
        order = np.argsort(key, kind="stable")
        dup = np.flatnonzero(key[order][1:] == key[order][:-1])
        if dup.size:
            a, b = order[dup[0]], order[dup[0] + 1]
            raise InputError(f"{file}: duplicate edge {str(raw.sources[a])!r} -> "
                             f"{str(raw.targets[a])!r} at lines {lines[a]} and {lines[b]} "
                             "(aggregate repeated ties before reading)")
        return SparseNetwork(i, j, np.asarray(raw.weights, dtype=np.float64), rows,
                             sd["directed"], name, cols)

    def node_ids(self, nodes: NodeTable | None, col_nodes: NodeTable | None,
                 raws: list[RawNetwork]) -> tuple[tuple[str, ...], tuple[str, ...] | None]:
        """Row and column node ids (column ids None for one-mode data)."""
        two_mode = self.spec["study"]["two_mode"]
        if (nodes is None or (two_mode and col_nodes is None)) and raws:
            unlabelled = [r for r in raws if not r.labelled]
            if unlabelled and len(unlabelled) < len(raws):
                raise InputError(f"{self.check.shown}: {unlabelled[0].name} has no node labels "
                                 "and other network files have; give [study] nodes (and "
                                 "col_nodes for two-mode data) so every file can be matched "
                                 "to nodes")
            if unlabelled:
                n, m = unlabelled[0].values.shape
                rows = nodes.ids if nodes is not None else tuple(str(k) for k in range(n))
                if not two_mode:
                    return rows, None
                cols = col_nodes.ids if col_nodes is not None else tuple(str(k) for k in range(m))
                return rows, cols
        if not two_mode:
            return (nodes.ids if nodes is not None else collect_labels(raws)), None
        rows = nodes.ids if nodes is not None else collect_labels(raws, axis="rows")
        cols = col_nodes.ids if col_nodes is not None else collect_labels(raws, axis="cols")
        return rows, cols

    def attribute(self, section: str, key: str, table: NodeTable, column: str, *,
                  need_all: bool = False, numeric: bool = False) -> np.ndarray:
        """A node-table column in node order, checked for what its use needs."""
        if column not in table.columns:
            raise self.check.error(section, key, f"no column {column!r} in {table.path.name}; "
                                   "columns: " + ", ".join(table.columns), column)
        values = table.columns[column]
        place = f"{table.path.name} column {column!r}"
        if numeric and values.dtype.kind != "f":
            r = next(k for k, v in enumerate(values) if v != "" and not _is_number(v))
            raise self.check.error(section, key, f"{key} needs numbers; {place} line "
                                   f"{table.lines[r]} holds {str(values[r])!r}", column)
        if need_all:
            empty = np.isnan(values) if values.dtype.kind == "f" else values == ""
            if empty.any():
                r = int(np.flatnonzero(empty)[0])
                raise self.check.error(section, key, f"{key} needs a value for every node; "
                                       f"{place} line {table.lines[r]} is empty", column)
        return values

    def derived(self, section: str, p: dict, nodes: NodeTable | None,
                col_nodes: NodeTable | None, n_rows: int) -> NodeDerived:
        kind = next(k for k in _DERIVED if k in p)
        column, name = p[kind], p["name"]
        numeric, need_all = kind in _NUMERIC_KINDS, kind == "same"
        if not self.spec["study"]["two_mode"]:
            values = self.attribute(section, kind, nodes, column, numeric=numeric,
                                    need_all=need_all)
            return _DERIVED[kind](values, name=name)
        col_values = None
        if kind != "sender":
            col_values = self.attribute(section, kind, col_nodes, column, numeric=numeric,
                                        need_all=need_all)
        if kind == "receiver":
            # a receiver term of two-mode data uses only the column nodes' attribute
            return receiver(col_values, name=name)
        values = self.attribute(section, kind, nodes, column, numeric=numeric,
                                need_all=need_all)
        if kind == "sender":
            return sender(values, name=name)
        return _DERIVED[kind](values, col_values, name=name)


def _group_key(value: Any) -> str:
    """A group label as the study file writes it: 3.0 -> "3", "north" -> "north"."""
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True


def _large(where: Any) -> bool:
    """Whether a network file is large enough to be read lazily (``SPARSE_ABOVE`` bytes)."""
    h5 = split_h5_path(str(where))
    try:
        return Path(h5[0] if h5 is not None else where).stat().st_size > SPARSE_ABOVE
    except OSError:
        return False


def _label_positions(raw: RawNetwork, labels: np.ndarray, ids: tuple[str, ...], file: str,
                     where: str) -> np.ndarray:
    """Positions in ``ids`` of an edge list's labels (vectorised: sorted ids and a binary
    search); an unknown label names its file line."""
    ids_arr = np.asarray(ids, dtype=str)
    order = np.argsort(ids_arr, kind="stable")
    sorted_ids = ids_arr[order]
    labels = np.asarray(labels, dtype=str)
    at = np.minimum(np.searchsorted(sorted_ids, labels), max(len(ids) - 1, 0))
    known = sorted_ids[at] == labels if len(ids) else np.zeros(labels.shape, dtype=bool)
    if not known.all():
        e = int(np.flatnonzero(~known)[0])
        raise InputError(f"{file} line {int(raw.lines[e])}: unknown node label "
                         f"{str(labels[e])!r}{where}")
    return order[at].astype(np.int64)
