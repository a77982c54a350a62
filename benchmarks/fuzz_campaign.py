"""Fuzzing campaign for boxwood's input paths (issue 11): N mutants per target, each run in a
bounded child process, counted as tried / rejected / loaded / crashed / hung / out-of-memory.

    python benchmarks/fuzz_campaign.py --artefact 100000 --onnx 10000 --records 20000 --seed 1

Targets (pluggable: add an entry to TARGETS, a class with ``seeds()``, ``mutant(rng, seed)``
and ``run(mutant)``):

* ``artefact`` -- boxwood JSON artefacts of the conformance zoo (a pipeline, AdaBoost with two
  and three classes, an isolation forest, a categorical HGB, a multiclass GB; pipelines with
  one-hot, target encoding and scalers, two calibrated classifiers, a transformed target and a
  several-target regressor), mutated three
  ways in turn: a value in the document changed and the digest recomputed (the mutant gets past
  the digest and meets the structural checks and the self-check); bytes edited with the digest
  kept; bytes edited and the digest recomputed over them. ``loaded`` mutants of the digest-kept
  kind must score like the original (else counted as ``changed``).
* ``onnx`` -- boxwood's exact ONNX graphs of six zoo models, one attribute of the tree operator,
  a metadata entry, the input shape or bytes of the file mutated. Mutants the reader accepts are
  run by onnxruntime and compared with boxwood's reading (device scorer) on rows at the read
  trees' own thresholds: raw scores bit for bit and labels; a difference is a ``disagreement``.
* ``records`` -- single records of random cell values for the zoo models (``Model.prepare``,
  ``record_from_text``, ``record_from_json``): a result or RecordError.

Outcomes: ``rejected`` = the project's own error class (ArtefactError / OnnxReadError /
RecordError) from a specific check; ``net`` = the same error class but from the loaders'
safety net (a check is missing: counted apart, a finding like a crash); ``crashed`` = any other
exception; ``hung`` = over --timeout seconds; ``oom`` = MemoryError under the child's address
space limit (--memory-mb, ``resource.setrlimit``). The campaign exits 1 when anything crashed,
hung, ran out of memory, hit the net, changed or disagreed. Progress goes to stderr, the summary
to stdout. Mutant i of a target is a pure function of (--seed, target, i): ``--only TARGET:I``
replays one and prints its traceback.
"""
from __future__ import annotations

import argparse
import concurrent.futures as cf
import hashlib
import json
import multiprocessing
import os
import random
import sys
import time
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)

OUTCOMES = ("rejected", "loaded", "net", "crashed", "hung", "oom", "changed", "disagreed")
INTERESTING_INTS = [0, 1, -1, 2, 3, 7, 255, 256, 65535, 2 ** 31 - 1, 2 ** 31, -2 ** 31, 2 ** 53 + 1, 2 ** 63,
                    10 ** 9, 10 ** 20, 10 ** 400, -10 ** 400]
INTERESTING_FLOATS = [0.0, -0.0, 0.5, -1.5, 1e-300, 5e-324, 1e308, -1e308, 3.4028234663852886e38, 1e-45]


class Hang(Exception):
    pass


# ----------------------------------------------------------------------------- mutation helpers
def _paths(obj, path=(), out=None):
    out = [] if out is None else out
    out.append(path)
    if isinstance(obj, dict):
        for k, v in obj.items():
            _paths(v, path + (k,), out)
    elif isinstance(obj, list):
        idx = range(len(obj)) if len(obj) <= 8 else sorted({0, 1, 2, len(obj) // 2, len(obj) - 2, len(obj) - 1})
        for i in idx:
            _paths(obj[i], path + (i,), out)
    return out


def _junk(rng):
    pick = rng.randrange(12)
    if pick == 0:
        return rng.choice(INTERESTING_INTS)
    if pick == 1:
        return rng.choice(INTERESTING_FLOATS)
    if pick == 2:
        return rng.choice(["inf", "-inf", "", "nan", "NaN", "x" * 10000, "1" * 5000, "\u2603", "0"])
    if pick == 3:
        return rng.choice([None, True, False])
    if pick == 4:
        return rng.choice([[], {}, [1], [[]], {"a": 1}, [None], ["a", "a"]])
    if pick == 5:
        return rng.uniform(-1e6, 1e6)
    if pick == 6:
        return rng.randrange(-100, 100)
    if pick == 7:
        return [rng.choice(INTERESTING_INTS) for _ in range(rng.randrange(1, 4))]
    if pick == 8:
        return {str(rng.randrange(1000)): rng.choice([[0], [1, 2], 5])}
    if pick == 9:
        return "%d" % rng.randrange(10 ** 6)
    if pick == 10:
        return [rng.uniform(-10, 10) for _ in range(rng.randrange(0, 5))]
    return rng.choice(INTERESTING_INTS) * rng.choice([1, -1])


def mutate_document(rng, doc):
    """One random change at a random place of ``doc`` (in place)."""
    paths = _paths(doc)[1:]
    path = rng.choice(paths)
    parent = doc
    for key in path[:-1]:
        parent = parent[key]
    last = path[-1]
    value = parent[last]
    op = rng.randrange(10)
    if op == 0:
        del parent[last]
    elif op == 1 and isinstance(value, list) and value:
        rng.shuffle(value) if rng.random() < 0.5 else value.pop(rng.randrange(len(value)))
    elif op == 2 and isinstance(value, list):
        value.append(rng.choice(value) if value and rng.random() < 0.5 else _junk(rng))
    elif op == 3 and isinstance(value, (int, float)) and not isinstance(value, bool):
        grown = (int(value) if value == value and abs(value) != float("inf") else 1) * 10 ** rng.randrange(1, 400)
        parent[last] = rng.choice([-value, value + 1, grown, value * 1.0000001, value - 1, 0])
    elif op == 4 and isinstance(value, dict):
        value[rng.choice(["x", "1" * 5000, "0", "99999999"])] = _junk(rng)
    elif op == 5 and isinstance(value, str):
        parent[last] = rng.choice([value + "x", value.upper(), value[::-1], "", value * 2])
    elif op == 6 and isinstance(value, list) and len(value) >= 2:
        i, j = rng.randrange(len(value)), rng.randrange(len(value))
        value[i], value[j] = value[j], value[i]
    else:
        parent[last] = _junk(rng)
    return doc


def mutate_bytes(rng, data):
    data = bytearray(data)
    for _ in range(rng.randrange(1, 5)):
        pos = rng.randrange(len(data))
        how = rng.randrange(4)
        if how == 0:
            data[pos] = rng.randrange(256)
        elif how == 1:
            data[pos:pos] = bytes([rng.choice(b'[]{}",:0123456789-.eE\\ \x00\xff')])
        elif how == 2:
            del data[pos:pos + rng.randrange(1, 8)]
        else:
            data[pos:pos + 1] = rng.choice([b"[" * 3000, b"9" * 5000, b"1e999", b"-", b"null", b'"'])
    return bytes(data)


# ----------------------------------------------------------------------------- targets
class ArtefactTarget:
    """boxwood JSON artefacts: value changed (digest recomputed), bytes edited (digest kept),
    bytes edited (digest recomputed)."""

    name = "artefact"
    CASES = ["pipe_hgbr_encoded", "ada_binary", "ada_multiclass", "iforest", "hgbc_categorical", "gbc_multiclass",
             # issue 15's parts: lookup and arithmetic steps, calibration, target steps, several targets
             "pipe_hgbc_onehot_scaled", "pipe_gbr_target_encoded", "cal_gbc_sigmoid_multiclass",
             "cal_rfc_isotonic_binary", "ttr_gbr_standard", "mor_hgbr"]

    def seeds(self):
        sys.path.insert(0, os.path.join(ROOT, "tests"))
        import zoo

        return [zoo.exported(name)[2] for name in self.CASES]

    def setup(self, seeds):
        scorer = _scorer()
        self.scorer = scorer
        self.seeds_ = seeds
        self.docs = [json.loads(s) for s in seeds]
        self.originals = [scorer.load(s) for s in seeds]
        self.rows = [[scorer._nan_for_null(r) for r in d["self_check"]["rows"]] for d in self.docs]

    def _body_bytes(self, data):
        """``data`` with its digest recomputed over whatever follows it."""
        sc = self.scorer
        n = len(sc._DIGEST_PREFIX)
        end = len(data.rstrip(b"\r\n"))
        if data[:n] != sc._DIGEST_PREFIX or data[n + 64:n + 66] != b'",':
            return data
        digest = hashlib.sha256(b"{" + data[n + 66:end]).hexdigest().encode()
        return data[:n] + digest + data[n + 64:]

    def mutant(self, rng, i):
        k = rng.randrange(len(self.seeds_))
        mode = i % 3
        if mode == 0:  # a value changed, digest recomputed
            doc = json.loads(self.seeds_[k])
            for _ in range(rng.choice([1, 1, 1, 2, 3])):
                mutate_document(rng, doc)
            body = {key: v for key, v in doc.items() if key != self.scorer.DIGEST_KEY}
            try:
                data = self.scorer.artefact_bytes(body)
            except (TypeError, ValueError, OverflowError):  # NaN and the like: write it as text anyway
                data = self._body_bytes(self.scorer._DIGEST_PREFIX + b"0" * 64 + b'",' + json.dumps(
                    body, sort_keys=True, separators=(",", ":")).encode()[1:])
            if rng.random() < 0.03:  # deep nesting somewhere, digest recomputed
                depth = rng.choice([65, 1000, 100000])
                data = data.replace(b'"provenance":{', b'"provenance":{"x":' + b"[" * depth + b"]" * depth + b",", 1)
                data = self._body_bytes(data)
            return ("doc", k, data)
        data = mutate_bytes(rng, self.seeds_[k])
        if mode == 2:
            data = self._body_bytes(data)
        return ("kept" if mode == 1 else "bytes", k, data)

    def run(self, mutant):
        kind, k, data = mutant
        sc = self.scorer
        try:
            model = sc.load(data)
        except sc.ArtefactError as exc:
            net = getattr(sc, "UNEXPECTED_CONTENT", None)  # (a scorer from before issue 11 has no net)
            return ("net", str(exc)[:160]) if net and net in str(exc) else "rejected"
        original = self.originals[k]
        for row in self.rows[k]:
            try:
                got = model.predict(row)
            except sc.RecordError:
                got = "RecordError"
            if kind == "kept" and repr(got) != repr(original.predict(row)):
                return "changed"
        return "loaded"


class OnnxTarget:
    """boxwood's exact ONNX graphs: one attribute, a metadata entry, the input shape or bytes mutated."""

    name = "onnx"
    CASES = ["rfr", "gbc_multiclass", "ada_binary", "iforest", "hgbc_categorical", "rfc_binary"]
    META = ["boxwood.semantics", "boxwood.reference", "boxwood.feature_names", "boxwood.categories",
            "boxwood.provenance", "boxwood.preprocessing"]

    def seeds(self):
        sys.path.insert(0, os.path.join(ROOT, "tests"))
        import zoo
        from boxwood.formats.onnx.exact import to_model

        return [to_model(zoo.exported(name)[1]).SerializeToString() for name in self.CASES]

    def setup(self, seeds):
        import onnx

        from boxwood.formats.json.device import device_model, hub_outputs
        from boxwood.formats.onnx.evaluators import OnnxRuntimeEvaluator
        from boxwood.formats.onnx.parse import OnnxReadError
        from boxwood.formats.onnx.reader import UNEXPECTED_CONTENT, read_onnx
        from boxwood.formats.registry import FormatError
        from boxwood.reference_rows import probe_rows
        from boxwood_runtime.scorer import RecordError

        self.onnx, self.seeds_ = onnx, seeds
        self.read, self.error, self.net = read_onnx, OnnxReadError, UNEXPECTED_CONTENT
        self.format_error, self.record_error = FormatError, RecordError
        self.ort, self.hub, self.device, self.probe = OnnxRuntimeEvaluator, hub_outputs, device_model, probe_rows

    def mutant(self, rng, i):
        onnx = self.onnx
        k = rng.randrange(len(self.seeds_))
        if i % 5 == 4:
            return (k, mutate_bytes(rng, self.seeds_[k]))
        m = onnx.ModelProto()
        m.ParseFromString(self.seeds_[k])
        node = next(n for n in m.graph.node if n.op_type.startswith("TreeEnsemble"))
        for _ in range(rng.choice([1, 1, 2])):
            pick = rng.randrange(10)
            if pick == 0:  # a metadata entry
                key = rng.choice(self.META)
                value = rng.choice([json.dumps(_junk(rng)), "[" * rng.choice([65, 5000]) + "]" * 10, "not json",
                                    json.dumps({"rows": _junk(rng), "raw": _junk(rng), "transformed": _junk(rng)})])
                entry = next((p for p in m.metadata_props if p.key == key), None) or m.metadata_props.add()
                entry.key, entry.value = key, value
                continue
            if pick == 1:  # the input shape
                dims = m.graph.input[0].type.tensor_type.shape.dim
                if len(dims) == 2:
                    dims[1].dim_value = rng.choice([0, 1, 2, 10 ** 9, 10 ** 12, dims[1].dim_value + 1])
                continue
            a = rng.choice(list(node.attribute))
            if pick == 2:
                node.attribute.remove(a)
                continue
            seq = a.ints if len(a.ints) else a.floats if len(a.floats) else None
            if seq is None and a.type == onnx.AttributeProto.TENSOR and len(a.t.double_data):
                seq = a.t.double_data
            if seq is None:
                if a.type == onnx.AttributeProto.INT:
                    a.i = rng.choice(INTERESTING_INTS[:9] + [a.i + 1, a.i - 1, 10 ** 9, 10 ** 7])
                elif a.type == onnx.AttributeProto.FLOAT:
                    a.f = rng.choice(INTERESTING_FLOATS[:6])
                continue
            j = rng.randrange(len(seq))
            ints = seq is a.ints
            value = (rng.choice([v for v in INTERESTING_INTS if abs(v) < 2 ** 63] + [seq[j] + 1, seq[j] - 1, len(seq)])
                     if ints else rng.choice(INTERESTING_FLOATS + [float("nan"), float("inf"), seq[j] * 1.5]))
            how = rng.randrange(5)
            try:
                if how <= 2:
                    seq[j] = value
                elif how == 3:
                    del seq[j:]
                else:
                    seq.append(value)
            except ValueError:  # beyond int64: protobuf cannot hold it, so no file can
                pass
        return (k, m.SerializeToString())

    def run(self, mutant):
        k, data = mutant
        try:
            ensemble = self.read(data)
        except self.error as exc:
            return ("net", str(exc)[:160]) if self.net in str(exc) else "rejected"
        model = self.device(ensemble)
        rows = []
        for r in self.probe(ensemble, 16):
            try:
                model.prepare([float("nan") if v is None else v for v in r])
            except self.record_error:
                continue
            rows.append(r)
        if not rows:
            return "loaded"
        try:
            ort = self.ort(data, ensemble).evaluate(rows)
        except self.format_error:
            raise
        except Exception:  # onnxruntime refuses the graph itself: nothing to compare
            return "loaded"
        ours = self.hub(ensemble, rows)
        import numpy as np

        if ort.raw.shape != ours.raw.shape or not np.array_equal(ort.raw, ours.raw):
            return "disagreed"
        if ours.labels is not None and list(ort.labels) != list(ours.labels):
            return "disagreed"
        return "loaded"


class RecordsTarget:
    """Single records of random cells for the artefact target's models."""

    name = "records"

    def seeds(self):
        return ArtefactTarget().seeds()

    def setup(self, seeds):
        scorer = _scorer()
        self.scorer = scorer
        self.models = [scorer.load(s) for s in seeds]

    def mutant(self, rng, i):
        k = rng.randrange(len(self.models))
        names = self.models[k].input_names
        cells = [_junk(rng) if rng.random() < 0.5 else rng.uniform(-3, 3) for _ in names]
        if rng.random() < 0.1:
            cells = cells[:rng.randrange(len(cells) + 1)] + [_junk(rng)] * rng.randrange(2)
        return (k, cells, rng.randrange(3))

    def run(self, mutant):
        k, cells, how = mutant
        model, sc = self.models[k], self.scorer
        try:
            if how == 0:
                model.predict(cells)
            elif how == 1:
                rec = dict(zip(model.input_names, [c if isinstance(c, str) else json.dumps(c) for c in cells]))
                model.predict(model.record_from_text(rec, 3))
            else:
                model.predict(model.record_from_json(dict(zip(model.input_names, cells)), 3))
        except sc.RecordError:
            return "rejected"
        return "loaded"


TARGETS = {"artefact": ArtefactTarget, "onnx": OnnxTarget, "records": RecordsTarget}


def _scorer():
    """The device scorer under test: boxwood_runtime's, or the file named by --scorer (e.g. an
    older scorer.py, to check that the campaign finds what it should)."""
    path = os.environ.get("BOXWOOD_FUZZ_SCORER")
    if not path:
        from boxwood_runtime import scorer

        return scorer
    import importlib.util

    spec = importlib.util.spec_from_file_location("scorer_under_test", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


# ----------------------------------------------------------------------------- the child process
_TARGET = None
_TIMEOUT = 5.0


def _child_init(target_name, seeds, timeout, memory_mb):
    global _TARGET, _TIMEOUT
    import resource
    import signal

    sys.path.insert(0, os.path.join(ROOT, "tests"))
    _TARGET = TARGETS[target_name]()
    _TARGET.setup(seeds)
    _TIMEOUT = timeout
    if memory_mb:
        limit = memory_mb * 1024 * 1024
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))

    def on_alarm(signum, frame):
        raise Hang()

    signal.signal(signal.SIGALRM, on_alarm)


def _one(seed, i, verbose=False):
    import signal

    rng = random.Random("%s:%s:%d" % (seed, _TARGET.name, i))
    mutant = _TARGET.mutant(rng, i)
    signal.setitimer(signal.ITIMER_REAL, _TIMEOUT)
    try:
        outcome = _TARGET.run(mutant)
        outcome, detail = outcome if isinstance(outcome, tuple) else (outcome, None)
    except Hang:
        outcome, detail = "hung", None
    except MemoryError:
        outcome, detail = "oom", None
    except Exception as exc:  # anything but the project's own error classes is a crash
        outcome = "crashed"
        detail = "%s: %s" % (type(exc).__name__, str(exc)[:160])
        if verbose:
            traceback.print_exc()
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
    return outcome, detail


def _batch(seed, start, stop):
    counts = dict.fromkeys(OUTCOMES, 0)
    examples = []
    for i in range(start, stop):
        outcome, detail = _one(seed, i)
        counts[outcome] += 1
        if outcome not in ("rejected", "loaded") and len(examples) < 5:
            examples.append((i, outcome, detail))
    return counts, examples


# ----------------------------------------------------------------------------- the parent
def campaign(target_name, n, seed, batch, timeout, memory_mb, out=sys.stderr):
    target = TARGETS[target_name]()
    seeds = target.seeds()
    totals = dict.fromkeys(OUTCOMES, 0)
    examples = []
    ctx = multiprocessing.get_context("spawn")  # a fresh child: the limits apply to it alone
    pool = None
    start = time.time()
    done = 0
    while done < n:
        if pool is None:
            pool = cf.ProcessPoolExecutor(1, mp_context=ctx, initializer=_child_init,
                                          initargs=(target_name, seeds, timeout, memory_mb))
        stop = min(n, done + batch)
        future = pool.submit(_batch, seed, done, stop)
        try:
            counts, found = future.result(timeout=timeout * (stop - done) + 120)
        except (cf.TimeoutError, cf.process.BrokenProcessPool) as exc:
            # the child hung beyond its alarm or died: replay the batch one mutant per child
            _stop_pool(pool)
            pool = None
            counts, found = _replay(target_name, seeds, seed, done, stop, timeout, memory_mb, ctx, exc)
        for key in OUTCOMES:
            totals[key] += counts[key]
        examples.extend(found[:max(0, 20 - len(examples))])
        done = stop
        rate = done / max(time.time() - start, 1e-9)
        print("[%s] %d/%d  %s  (%.0f/s)" % (target_name, done, n, " ".join("%s=%d" % (k, v) for k, v in totals.items()
                                                                        if v), rate), file=out, flush=True)
    if pool is not None:
        pool.shutdown()
    return totals, examples, time.time() - start


def _stop_pool(pool):
    for p in list(getattr(pool, "_processes", {}).values()):  # the workers this campaign started
        try:
            p.kill()
        except Exception:
            pass
    pool.shutdown(wait=False, cancel_futures=True)


def _replay(target_name, seeds, seed, start, stop, timeout, memory_mb, ctx, why):
    counts = dict.fromkeys(OUTCOMES, 0)
    found = []
    for i in range(start, stop):
        pool = cf.ProcessPoolExecutor(1, mp_context=ctx, initializer=_child_init,
                                      initargs=(target_name, seeds, timeout, memory_mb))
        try:
            c, f = pool.submit(_batch, seed, i, i + 1).result(timeout=timeout + 120)
            pool.shutdown()
        except cf.TimeoutError:
            _stop_pool(pool)
            c, f = dict.fromkeys(OUTCOMES, 0), [(i, "hung", "beyond the alarm")]
            c["hung"] = 1
        except cf.process.BrokenProcessPool:
            _stop_pool(pool)
            c, f = dict.fromkeys(OUTCOMES, 0), [(i, "crashed", "the child process died (%s)" % type(why).__name__)]
            c["crashed"] = 1
        for key in OUTCOMES:
            counts[key] += c[key]
        found.extend(f)
    return counts, found


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    for name in TARGETS:
        parser.add_argument("--" + name, type=int, default=0, metavar="N", help="mutants of target %s" % name)
    parser.add_argument("--seed", default="1")
    parser.add_argument("--batch", type=int, default=500, help="mutants per child task")
    parser.add_argument("--timeout", type=float, default=10.0, help="seconds per mutant")
    parser.add_argument("--memory-mb", type=int, default=4096, help="address space limit of the child")
    parser.add_argument("--scorer", metavar="PATH", help="the device scorer file to fuzz (default: boxwood_runtime's)")
    parser.add_argument("--only", metavar="TARGET:I", help="replay one mutant in this process, with its traceback")
    args = parser.parse_args(argv)
    sys.path.insert(0, os.path.join(ROOT, "tests"))
    if args.scorer:
        os.environ["BOXWOOD_FUZZ_SCORER"] = os.path.abspath(args.scorer)  # read by the spawned children
    if args.only:
        name, i = args.only.split(":")
        target = TARGETS[name]()
        _child_init(name, target.seeds(), args.timeout, 0)
        print(_one(args.seed, int(i), verbose=True))
        return 0
    bad = 0
    print("target     tried  rejected  loaded  net  crashed  hung  oom  changed  disagreed  seconds")
    for name in TARGETS:
        n = getattr(args, name)
        if not n:
            continue
        totals, examples, seconds = campaign(name, n, args.seed, args.batch, args.timeout, args.memory_mb)
        print("%-8s %7d  %8d  %6d  %3d  %7d  %4d  %3d  %7d  %9d  %7.0f" % (
            name, n, totals["rejected"], totals["loaded"], totals["net"], totals["crashed"], totals["hung"],
            totals["oom"], totals["changed"], totals["disagreed"], seconds), flush=True)
        for i, outcome, detail in examples:
            print("    %s:%d %s %s" % (name, i, outcome, detail or ""), flush=True)
        bad += sum(totals[k] for k in ("net", "crashed", "hung", "oom", "changed", "disagreed"))
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
