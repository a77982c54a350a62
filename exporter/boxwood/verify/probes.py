"""Rows for the empirical check: the user's data, and generated probes.

Every row is a list in feature order: a float for a numeric value, a category value
(string or number) for a categorical one, None for missing. Each row carries an origin
(what it probes, where) so that a report can say exactly which input showed a difference.

Generated probes, in priority order, within a row budget (``DEFAULT_PROBE_ROWS``):

1. specials, per feature: NaN (where the model routes missing values), every known
   category, an unseen category (a string or number the model never saw), the extremes
   (+-inf where accepted, the largest finite input accepted: +-max float64, or for a
   model compared in float32 the largest float64 that still rounds to a finite float32,
   and +-F32_MAX), zeros of both signs and the smallest subnormals;
2. split probes: for each split of the source and of the artefact, a row built to REACH
   that node (its ancestors' conditions hold) with the split's feature set to the values
   on both sides of the boundary at the precision that matters: the threshold t and its
   float64 neighbours; for float32 comparisons also B (the largest float64 that goes
   left, :func:`numerics.float32_left_boundary`), the float64 after B, the float32 values
   around t; and NaN where missing values are routed. Distinct boundaries come first,
   then the remaining nodes, each group in a seeded random order;
3. random rows, uniform in the observed range of each feature (the data's, widened to the
   thresholds'), with some missing values where routed.
"""
from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, Iterable, List, Optional, Sequence, Tuple

import numpy as np

from ..ir import LEAF, Ensemble, Tree
from ..reference_rows import arithmetic_of, forward, raw_around
from .. import numerics
from ..numerics import Domain, numeric_domain

DEFAULT_PROBE_ROWS = 4000
UNSEEN_STRING = "\u2205boxwood-unseen-category"
MAX_CATEGORIES_PER_FEATURE = 64


class Rows:
    """Rows with their origins (``kinds[i]`` is one of ORIGIN_KINDS, ``origins[i]`` says where)."""

    ORIGIN_KINDS = ("data", "special", "split", "random")

    def __init__(self) -> None:
        self.rows: List[List[Any]] = []
        self.kinds: List[str] = []
        self.origins: List[str] = []
        self._seen: set = set()
        # Rows the source model reads differently from the box (index -> the source's row):
        # a data file is read by pandas for the source and by the box's reader for artefacts.
        self.source_rows: Dict[int, List[Any]] = {}
        self.reading: Optional["Reading"] = None
        # For the HTML report's coverage plot: the feature each row targets (None: data or
        # random rows), and the (side label, tree, node) splits a probe row was built to reach.
        self.targets: List[Optional[int]] = []
        self.probed_nodes: set = set()

    def for_source(self) -> List[List[Any]]:
        """The rows as the source model reads them (the artefacts' rows, except where the
        workstation's reading of a data file differs)."""
        return [self.source_rows.get(i, r) for i, r in enumerate(self.rows)]

    def add(self, row: List[Any], kind: str, origin: str, dedupe: bool = True, target: Optional[int] = None) -> bool:
        if dedupe:
            key = tuple(_key(v) for v in row)
            if key in self._seen:
                return False
            self._seen.add(key)
        self.rows.append(row)
        self.kinds.append(kind)
        self.origins.append(origin)
        self.targets.append(target)
        return True

    def __len__(self) -> int:
        return len(self.rows)

    def counts(self) -> Dict[str, int]:
        out = {k: 0 for k in self.ORIGIN_KINDS}
        for k in self.kinds:
            out[k] += 1
        return out


def _key(v: Any) -> Any:
    if isinstance(v, float):
        return ("f", v.hex()) if v == v else ("nan",)
    return ("o", type(v).__name__, v)


# ----------------------------------------------------------------------------- user data
@dataclass
class Reading:
    """How a data file was read on each side: the box's reader (``boxwood_runtime.stream``,
    as ``boxwood score`` and ``box.py score`` read it) and the workstation's (pandas), and
    every place, by row and field, where the two readings differ."""

    file: str
    fmt: str  # "csv" or "jsonl"
    workstation: str  # the pandas call
    rows: int  # data rows the box read
    differences: List[str] = field(default_factory=list)
    rows_differing: int = 0


def read_data(data: Any, source: Ensemble) -> Rows:
    """The user's rows: a CSV (header row) or JSON Lines file path, a pandas DataFrame, a
    numpy array, or a list of records (dicts by feature name, or sequences in feature order).

    A file is read twice, once for each side: by the box's reader for the artefacts
    (``boxwood_runtime.stream.read_records``, the device scorer's record parsing: missing
    tokens, numbers, category values; an unseen category is kept and routed as missing),
    and by pandas for the source model (``pandas.read_csv`` / ``pandas.read_json(lines=True)``:
    what the workstation feeds a model trained on a DataFrame). Where the two readings of a
    row differ, the source gets pandas' values, and ``Rows.reading`` names the row and field
    (the verifier then fails: the box would not compute what the workstation computes).
    Python data (a DataFrame, an array, records) is one reading, given to both sides.

    Raises ValueError naming the row and field of the first row that neither reading can
    score (bad input: exit code 2)."""
    from ..formats.json.device import device_model

    model = device_model(source)
    out = Rows()
    names = input_names(model)
    if isinstance(data, (str, Path)):
        _read_file_both_ways(Path(data), model, names, out)
        return out
    for n, where, record in _python_records(data, model):
        row = _checked_row(model, n, where, record, names)
        out.add(row, "data", where, dedupe=False)
    return out


def _checked_row(model: Any, n: int, where: str, record: Any, names: List[str]) -> List[Any]:
    """The record as a row in ``names`` order, after the device scorer accepted it."""
    from boxwood_runtime import RecordError

    try:
        if isinstance(record, dict):
            row = [record.get(name) for name in names]
            model.prepare(record, n)
        else:
            row = list(record)
            model.prepare(row, n)
    except RecordError as exc:
        raise ValueError("%s: %s" % (where, exc.reason if exc.field is None else
                                     "field %r: %s" % (exc.field, exc.reason)))
    except OverflowError as exc:
        raise ValueError("%s: a number is out of range: %s" % (where, exc))
    return [_clean(v) for v in row]


def _clean(v: Any) -> Any:
    if v is None:
        return None
    if isinstance(v, float) and v != v:
        return None
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)) and not isinstance(v, bool):
        return float(v)
    if isinstance(v, np.floating):
        v = float(v)
        return None if v != v else v
    if v.__class__.__name__ in ("NAType", "NaTType"):  # pandas' own missing markers
        return None
    return v


def same_value(box: Any, workstation: Any) -> bool:
    """Whether the box's parsed value and the workstation's are the same input: both
    missing, equal numbers, or equal strings (a string and a number never are)."""
    if box is None or workstation is None:
        return box is None and workstation is None
    num = (int, float)
    if isinstance(box, bool) or isinstance(workstation, bool):
        return type(box) is type(workstation) and box == workstation
    if isinstance(box, num) and isinstance(workstation, num):
        return float(box) == float(workstation)
    return type(box) is type(workstation) and box == workstation


def _shown(v: Any) -> str:
    return "missing" if v is None else repr(v)


def _read_file_both_ways(path: Path, model: Any, names: List[str], out: Rows) -> None:
    from boxwood_runtime.stream import StreamError, read_records

    if path.is_dir():
        raise IsADirectoryError("data file %r is a folder, not a file" % str(path))
    if not path.is_file():
        raise FileNotFoundError("data file %r not found" % str(path))
    try:
        with path.open(encoding="utf-8", newline="") as fh:
            fmt, _, rows, _ = read_records(model, fh)
            box = [(n, "data " + where, record, error) for n, where, _ident, _has_id, record, error in rows]
    except UnicodeDecodeError as exc:
        raise ValueError("the data file %r is not UTF-8 text: %s" % (str(path), exc))
    except StreamError as exc:
        raise ValueError("the data file %r: %s" % (str(path), exc))
    frame, call = _workstation_frame(path, fmt, exact_json=getattr(model, "json_float", float) is float)
    lacking = [f for f in names if f not in frame.columns]
    if lacking:
        raise ValueError("pandas reads no column %s from the data file %r (it reads: %s)" % (
            ", ".join(map(repr, lacking)), str(path), ", ".join(map(str, frame.columns))))
    theirs = frame[names].to_dict("records")
    reading = Reading(str(path), fmt, call, len(box))
    if len(theirs) != len(box):
        reading.differences.append("the box reads %d data rows, %s reads %d" % (len(box), call, len(theirs)))
    for k, (n, where, record, error) in enumerate(box):
        ws = [_clean(theirs[k][name]) for name in names] if k < len(theirs) else None
        if error is not None:
            # The box refuses the row. If the workstation reads the refused field as missing
            # (a token only pandas knows, say), the two readings differ: a parity failure.
            # Otherwise both sides see a bad value: bad input, as before.
            refused = next((i for i, nm in enumerate(names) if ", field %r:" % (nm,) in error), None)
            if ws is None or refused is None or ws[refused] is not None:
                raise ValueError("data %s" % error)
            reading.rows_differing += 1
            reading.differences.append("%s, field %r: the box refuses the value (%s); %s reads it as missing" % (
                where, names[refused], error.split(": ", 1)[-1], call))
            continue
        row = _checked_row(model, n, where, record, names)
        index = len(out.rows)
        out.add(row, "data", where, dedupe=False)
        if ws is None:
            continue
        differ = [(nm, b, w) for nm, b, w in zip(names, row, ws) if not same_value(b, w)]
        if differ:
            reading.rows_differing += 1
            out.source_rows[index] = ws
            for nm, b, w in differ:
                reading.differences.append("%s, field %r: the box reads %s, %s reads %s" % (
                    where, nm, _shown(b), call, _shown(w)))
    out.reading = reading


def _workstation_frame(path: Path, fmt: str, exact_json: bool) -> Tuple[Any, str]:
    """The data file as the workstation reads it, as the artefact says the workstation reads
    text: ``pandas.read_csv`` with its defaults; for JSON Lines ``pandas.read_json(lines=True)``
    with its default float parser (not correctly rounded: it keeps 15 fraction digits; the
    artefact's ``inputs.json_numbers`` is "15_decimals", as for pipelines) or with
    ``precise_float=True`` (correctly rounded, as Python's float(); ``json_numbers`` "exact")."""
    import pandas as pd

    try:
        if fmt == "jsonl":
            if exact_json:
                return (pd.read_json(path, lines=True, precise_float=True),
                        "pandas.read_json(lines=True, precise_float=True)")
            return pd.read_json(path, lines=True), "pandas.read_json(lines=True)"
        return pd.read_csv(path), "pandas.read_csv"
    except (ValueError, pd.errors.ParserError) as exc:
        raise ValueError("pandas cannot read the data file %r: %s" % (str(path), exc))


def input_names(model: Any) -> List[str]:
    """What a record carries: the features, or a pipeline's raw fields."""
    return list(getattr(model, "input_names", None) or model.feature_names)


def _python_records(data: Any, model: Any) -> Iterable[Tuple[int, str, Any]]:
    names = input_names(model)
    if hasattr(data, "columns") and hasattr(data, "itertuples"):  # a pandas DataFrame
        lacking = [f for f in names if f not in data.columns]
        if lacking:
            raise ValueError("the data frame lacks the model's column(s) %s" % ", ".join(map(repr, lacking)))
        frame = data[names]
        for n, rec in enumerate(frame.itertuples(index=False), 1):
            yield n, "data row %d" % n, [_clean(v) for v in rec]
        return
    if isinstance(data, np.ndarray):
        if data.ndim != 2 or data.shape[1] != len(names):
            raise ValueError("the data array has shape %s; the model takes (n, %d)" % (data.shape, len(names)))
        data = data.tolist()
    for n, rec in enumerate(data, 1):
        if isinstance(rec, dict):
            yield n, "data row %d" % n, {k: _clean(v) for k, v in rec.items()}
        else:
            yield n, "data row %d" % n, [_clean(v) for v in rec]


# ----------------------------------------------------------------------------- probes
class _Plan:
    """Domains and value ranges for probe generation (what the source accepts)."""

    def __init__(self, source: Ensemble, ensembles: Sequence[Tuple[Ensemble, str]], rows: Sequence[Sequence[Any]]):
        self.source = source
        self.features = source.features
        self.routes = source.missing_values == "route"
        self.domain: List[Optional[Domain]] = []
        for f in source.features:
            self.domain.append(None if f.is_categorical else numeric_domain(
                "float64", {source.compare_precision}, source.accepts_infinity, self.routes))
        self.float32 = source.compare_precision == "float32" or any(p == "float32" for _, p in ensembles)
        # observed ranges: finite data values and thresholds
        lo = [math.inf] * len(self.features)
        hi = [-math.inf] * len(self.features)
        for r in rows:
            for j, v in enumerate(r):
                if isinstance(v, float) and math.isfinite(v) and self.domain[j] is not None:
                    lo[j], hi[j] = min(lo[j], v), max(hi[j], v)
        for e, _ in ensembles:
            for t in e.trees:
                for i in range(t.n_nodes):
                    j = t.feature[i]
                    if j >= 0 and t.left_categories[i] is None and math.isfinite(t.threshold[i]) \
                            and j < len(self.features) and self.domain[j] is not None:
                        lo[j], hi[j] = min(lo[j], t.threshold[i]), max(hi[j], t.threshold[i])
        self.lo = [(-1.0 if math.isinf(a) else a) for a in lo]
        self.hi = [(1.0 if math.isinf(b) else b) for b in hi]
        for j in range(len(self.features)):
            if self.lo[j] > self.hi[j]:
                self.lo[j], self.hi[j] = self.hi[j], self.lo[j]
            d = self.domain[j]
            if d is not None:
                self.lo[j] = max(self.lo[j], d.lo if math.isfinite(d.lo) else -numerics.F64_MAX)
                self.hi[j] = min(self.hi[j], d.hi if math.isfinite(d.hi) else numerics.F64_MAX)

    def categories(self, j: int) -> List[Any]:
        return list(self.features[j].categories)

    def unseen(self, j: int) -> List[Any]:
        cats = self.categories(j)
        if any(isinstance(c, str) for c in cats):
            return [UNSEEN_STRING]
        nums = [c for c in cats if isinstance(c, (int, float))]
        out = [float(max(nums) + 1), -1.0, 0.5]
        if 0.0 in nums:
            out.append(-0.0)  # equal to the category 0.0: a probe of sign handling, not unseen
        return out

    def random_row(self, rng: np.random.Generator, missing_rate: float = 0.0) -> List[Any]:
        row: List[Any] = []
        for j, f in enumerate(self.features):
            if self.routes and missing_rate and rng.random() < missing_rate:
                row.append(None)
            elif f.is_categorical:
                row.append(f.categories[int(rng.integers(len(f.categories)))])
            else:
                v = float(rng.uniform(self.lo[j], self.hi[j])) if self.hi[j] > self.lo[j] else self.lo[j]
                if not math.isfinite(v):
                    v = 0.0
                if self.source.compare_precision == "float32" and rng.random() < 0.5:
                    v = numerics.round32(v)  # exact float32 values meet float32 thresholds more often
                row.append(v)
        return row


class _Boundaries:
    """``numerics.left_boundary`` remembered per threshold (by its bits, so 0.0 and -0.0 stay
    apart): a big forest repeats thresholds (midpoints between the same training values)
    across its trees and sides, and the float32 boundary is exact rational arithmetic."""

    def __init__(self) -> None:
        self.known: Dict[Tuple[bytes, str], float] = {}

    def __call__(self, t: float, precision: str) -> float:
        if precision == "float64":
            return t
        key = (struct.pack("<d", t), precision)
        b = self.known.get(key)
        if b is None:
            b = self.known[key] = numerics.left_boundary(t, precision)
        return b


def _node_constraints(tree: Tree, precision: str, plan: _Plan,
                      boundary: Any = numerics.left_boundary) -> Dict[int, Tuple[Dict[int, Any], ...]]:
    """For each node of ``tree``, the conditions on the path from the root:
    {feature: (lo_excl, hi_incl)} for numeric features, {feature: set of category values}.
    ``boundary(t, precision)`` is numerics.left_boundary (or a :class:`_Boundaries`)."""
    out: Dict[int, Any] = {}
    stack: List[Tuple[int, Dict[int, Any]]] = [(0, {})]
    while stack:
        node, cons = stack.pop()
        out[node] = cons
        f = tree.feature[node]
        if f == LEAF or f >= len(plan.features):
            continue
        if tree.left_categories[node] is None:
            b = boundary(tree.threshold[node], precision)
            lo, hi = cons.get(f, (None, math.inf))
            left = dict(cons)
            left[f] = (lo, min(hi, b))
            right = dict(cons)
            right[f] = (b if lo is None else max(lo, b), hi)
        else:
            cats = plan.categories(f)
            allowed = cons.get(f, set(cats))
            codes = set(tree.left_categories[node])
            left = dict(cons)
            left[f] = {c for i, c in enumerate(cats) if i in codes and c in allowed}
            right = dict(cons)
            right[f] = {c for i, c in enumerate(cats) if i not in codes and c in allowed}
        stack.append((tree.left[node], left))
        stack.append((tree.right[node], right))
    return out


def _fit_row(base: Sequence[Any], cons: Dict[int, Any], plan: _Plan) -> Optional[List[Any]]:
    """``base`` changed as little as possible so that every condition in ``cons`` holds."""
    row = list(base)
    for f, c in cons.items():
        if isinstance(c, set):
            if row[f] not in c:
                if not c:
                    return None
                cats = plan.categories(f)
                row[f] = min(c, key=cats.index)
            continue
        d = plan.domain[f]
        lo, hi = c
        above = d.first_above(lo)
        if above is None or above > hi:
            return None
        v = row[f]
        if not (isinstance(v, float) and v == v):
            v = plan.lo[f] / 2 + plan.hi[f] / 2
        v = min(max(v, d.lo), d.hi)
        if lo is not None and v <= lo:
            v = above
        elif v > hi:
            w = d.last_at_most(hi)
            v = w if w is not None and (lo is None or w > lo) else above
        row[f] = v
    return row


def _boundary_values(t: float, precision: str) -> List[Tuple[float, str]]:
    vals = [(t, "t"), (numerics.next_down(t), "t-1ulp"), (numerics.next_up(t), "t+1ulp")]
    if precision == "float32":
        b = numerics.float32_left_boundary(t)
        f = numerics.float32_floor(t)
        vals += [(b, "B (last float64 going left)"), (numerics.next_up(b), "B+1ulp (first going right)"),
                 (f, "float32 floor of t"), (numerics.next32_above(f), "next float32"),
                 (numerics.next32_below(f), "previous float32")]
    return vals


def generate(source: Ensemble, ensembles: Sequence[Tuple[Ensemble, str, str]], base: Sequence[Sequence[Any]],
             budget: int = DEFAULT_PROBE_ROWS, seed: int = 0, out: Optional[Rows] = None) -> Rows:
    """Probe rows for ``source`` and the artefact ensembles ``(ensemble, compare precision, label)``.

    ``base`` are typical rows (the user's data, or none); ``budget`` bounds the number of
    generated rows (0: none). Deterministic for a given seed.
    """
    out = out if out is not None else Rows()
    if budget <= 0:
        return out
    rng = np.random.default_rng(seed)
    sides = [(source, source.compare_precision, "source")] + [tuple(e) for e in ensembles]
    plan = _Plan(source, [(e, p) for e, p, _ in sides], base)
    limit = len(out) + budget
    bases = [list(r) for r in base[:256]] if base else []
    if len(base) > 256:
        bases = [list(base[int(i)]) for i in rng.choice(len(base), 256, replace=False)]
    while len(bases) < 16:
        bases.append(plan.random_row(rng))
    names = [f.name for f in plan.features]

    def base_row(i: int) -> List[Any]:
        return list(bases[i % len(bases)])

    split_limit = limit - max(budget // 8, 16) if budget > 32 else limit
    # 1. specials
    specials: List[Tuple[int, Any, str]] = []
    for j, f in enumerate(plan.features):
        if plan.routes:
            specials.append((j, None, "missing"))
        if f.is_categorical:
            for c in plan.categories(j)[:MAX_CATEGORIES_PER_FEATURE]:
                specials.append((j, c, "category %r" % (c,)))
            for c in plan.unseen(j):
                specials.append((j, c, "unseen category %r" % (c,)))
            continue
        d = plan.domain[j]
        values = [d.lo, d.hi, -numerics.F64_MAX, numerics.F64_MAX, 0.0, -0.0, 5e-324, -5e-324]
        if plan.float32:
            values += [numerics.F32_MAX, -numerics.F32_MAX, numerics.float32_input_limit(), -numerics.float32_input_limit(),
                       2.0 ** -149, -2.0 ** -149, 2.0 ** -150, numerics.next_up(2.0 ** -150)]
        seen = set()
        for v in values:
            if d.contains(v) and v.hex() not in seen:
                seen.add(v.hex())
                specials.append((j, v, "extreme %r" % v))
    for n, (j, v, what) in enumerate(specials):
        if len(out) >= limit:
            return out
        row = base_row(n)
        row[j] = v
        out.add(row, "special", "%s in %r" % (what, names[j]), target=j)

    # 2. split probes: distinct boundaries first, then the other nodes
    first, rest, seen_b = [], [], set()
    boundary = _Boundaries()
    for s, (e, precision, label) in enumerate(sides):
        for ti, t in enumerate(e.trees):
            for node in range(t.n_nodes):
                f = t.feature[node]
                if f == LEAF or f >= len(plan.features):
                    continue
                if t.left_categories[node] is None:
                    key = (f, boundary(t.threshold[node], precision))
                else:
                    key = (f, t.left_categories[node], t.missing_left[node])
                target = (s, ti, node)
                (rest if key in seen_b else first).append(target)
                seen_b.add(key)
    order = [first[i] for i in rng.permutation(len(first))] + [rest[i] for i in rng.permutation(len(rest))]
    cache: Dict[Tuple[int, int], Any] = {}
    for n, (s, ti, node) in enumerate(order):
        if len(out) >= split_limit:
            break
        e, precision, label = sides[s]
        t = e.trees[ti]
        if (s, ti) not in cache:
            cache[(s, ti)] = _node_constraints(t, precision, plan, boundary)
        cons = cache[(s, ti)].get(node)
        if cons is None:
            continue
        row = _fit_row(base_row(n), cons, plan)
        if row is None:
            continue
        f = t.feature[node]
        out.probed_nodes.add((label, ti, node))
        where = "%s tree %d node %d, %r" % (label, ti, node, names[f])
        if t.left_categories[node] is None:
            d = plan.domain[f]
            lo, hi = cons.get(f, (None, math.inf))
            for v, what in _boundary_values(t.threshold[node], precision):
                if d.contains(v) and (lo is None or v > lo) and v <= hi:
                    r = list(row)
                    r[f] = v
                    out.add(r, "split", "%s = %r (%s, t = %r)" % (where, v, what, t.threshold[node]), target=f)
        else:
            allowed = cons.get(f, set(plan.categories(f)))
            for c in [c for c in plan.categories(f) if c in allowed][:16] + plan.unseen(f)[:1]:
                r = list(row)
                r[f] = c
                out.add(r, "split", "%s = %r" % (where, c), target=f)
        if plan.routes:
            r = list(row)
            r[f] = None
            out.add(r, "split", "%s = missing" % where, target=f)

    # 3. random rows in the observed ranges (an eighth of the budget, or what is left)
    limit = min(limit, len(out) + max(budget // 8, 16))
    n = 0
    while len(out) < limit and n < 4 * budget:
        out.add(plan.random_row(rng, missing_rate=0.05), "random", "random row %d (seed %d)" % (n, seed))
        n += 1
    return out


def round_rows_float32(rows: Sequence[Sequence[Any]], source: Ensemble, keep_all: bool = False
                       ) -> Tuple[List[List[Any]], List[int]]:
    """Rows with numeric values rounded to float32 (for evaluators that take float32 input);
    returns (rows, indices kept): rows with a value beyond the float32 range are dropped
    (``keep_all``: kept, with the value as infinity)."""
    out, kept = [], []
    numeric = [not f.is_categorical for f in source.features]
    for i, r in enumerate(rows):
        new = []
        for j, v in enumerate(r):
            if numeric[j] and isinstance(v, float):
                w = numerics.round32(v)
                if math.isinf(w) and not math.isinf(v) and not keep_all:
                    break
                new.append(w)
            else:
                new.append(v)
        else:
            out.append(new)
            kept.append(i)
    return out, kept


def to_field_rows(rows: Sequence[Sequence[Any]], source: Ensemble,
                  targets: Optional[Sequence[Optional[int]]] = None) -> List[List[Any]]:
    """Feature-space rows as raw-field rows, for an ensemble with preprocessing (a
    pipeline). A field takes the value of the feature a probe targets when it feeds
    that feature, else of the first feature it feeds, mapped back through that feature's
    steps: an encoded feature's code becomes its category (the nearest code, clamped); a
    looked-up feature's value becomes the category whose table value is nearest (the
    first on a tie); a scaled feature's value becomes the raw value whose transform is
    nearest; other values pass through; a field no feature reads is None."""
    fields = source.fields
    field_of = [fields.index(f.source["field"]) for f in source.features]
    first = {}
    for j, fi in enumerate(field_of):
        first.setdefault(fi, j)
    out = []
    for n, r in enumerate(rows):
        pick = dict(first)
        t = targets[n] if targets is not None and n < len(targets) else None
        if t is not None and 0 <= t < len(field_of):
            pick[field_of[t]] = t
        new: List[Any] = [None] * len(fields)
        for fi, j in pick.items():
            new[fi] = _field_value(r[j], source.features[j].source["steps"])
        out.append(new)
    return out


def _field_value(v: Any, steps: Sequence[Dict[str, Any]]) -> Any:
    """A raw value that the steps turn into (about) ``v``."""
    if not isinstance(v, float) or not math.isfinite(v):
        return v
    enc = next((st for st in steps if st.get("op") in ("encode", "lookup")), None)
    if enc is not None:
        cats = enc["categories"]
        if enc["op"] == "encode":
            return cats[int(min(max(round(v), 0), len(cats) - 1))]
        gaps = [abs(w - v) for w in enc["values"]]
        return cats[gaps.index(min(gaps))]
    seq = arithmetic_of(steps)
    if seq is not None:
        near = raw_around(seq, v)
        if near:
            return min(near, key=lambda x: abs(forward(seq, x) - v))
    return v


def field_probes(source: Ensemble, budget: int = 2000) -> List[Tuple[List[Any], str, Optional[int]]]:
    """Raw-field probes for a pipeline's steps, as (row, origin, target feature): every
    category of every encoder or lookup table, an unseen value and a missing value in
    each such field; for a scaled field, the two raw float64 neighbours whose scaled
    values bracket each split threshold of the feature (``reference_rows.raw_around``:
    the last raw value going left and the first going right). The other fields hold a
    base row's values (each field's first category, or the middle threshold)."""
    fields = source.fields
    thresholds: List[List[float]] = [[] for _ in source.features]
    for t in source.trees:
        for i in range(t.n_nodes):
            f = t.feature[i]
            if f != LEAF and t.left_categories[i] is None and math.isfinite(t.threshold[i]):
                thresholds[f].append(t.threshold[i])
    base: List[Any] = [None] * len(fields)
    specs: List[Tuple[int, Any, str, int]] = []
    done = set()
    for j, f in enumerate(source.features):
        fi = fields.index(f.source["field"])
        steps = f.source["steps"]
        enc = next((st for st in steps if st.get("op") in ("encode", "lookup")), None)
        if enc is not None:
            cats = enc["categories"]
            if base[fi] is None:
                base[fi] = cats[0]
            if fi in done:
                continue
            done.add(fi)
            textual = any(isinstance(c, str) for c in cats)
            unseen: Any = "\x00unseen"
            if not textual:
                unseen = float(max(c for c in cats if isinstance(c, (int, float)))) + 1.5
            for c in cats:
                specs.append((fi, c, "category %r" % (c,), j))
            specs.append((fi, unseen, "unseen category %r" % (unseen,), j))
            specs.append((fi, None, "missing", j))
            continue
        seq = arithmetic_of(steps)
        if seq is None:
            continue
        ts = sorted(set(thresholds[j]))
        if base[fi] is None:
            mid = raw_around(seq, ts[len(ts) // 2]) if ts else []
            base[fi] = mid[0] if mid else 0.0
        for t in ts:
            for x, side in zip(raw_around(seq, t), ("last raw value going left", "first raw value going right")):
                specs.append((fi, x, "%s of threshold %r of %r" % (side, t, f.name), j))
    base = [0.0 if v is None else v for v in base]
    out = []
    for fi, v, what, j in specs[:budget]:
        row = list(base)
        row[fi] = v
        out.append((row, "%s in %r" % (what, fields[fi]), j))
    return out
