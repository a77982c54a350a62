"""Run Python code under MicroPython, using the MicroPython WebAssembly port run by node.

The port is the npm package ``@micropython/micropython-webassembly-pyscript``; the
repository pins it in ``tests/micropython/package.json`` and ``.ci/run`` installs it
into ``tests/micropython/node_modules``. It is a real MicroPython (the same C core
as on boards, built for 32-bit WebAssembly with double-precision floats), so its object
sizes are those of a 32-bit board (ESP32, RP2040/RP2350, STM32).

The port cannot read the host's files: it has an in-memory file system of its own.
:func:`run` sends the code and any files as one job to ``micropython_run.mjs``, which
writes the files into the port's file system and runs the code there.

Used by ``boxwood bundle`` / ``boxwood inspect --micropython`` (the memory footprint
of the scorer, :func:`measure_footprint`) and by ``tests/test_micropython.py``.
"""
from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
from pathlib import Path
from typing import Any, Dict, List, Mapping, Optional, Union

PACKAGE = "@micropython/micropython-webassembly-pyscript"
ENV_PORT = "BOXWOOD_MICROPYTHON_PORT"  # a folder holding the package's micropython.mjs
RUNNER = Path(__file__).with_name("micropython_run.mjs")
# Where .ci/run installs the pinned port in a source checkout.
CHECKOUT_PORT = Path(__file__).resolve().parents[2] / "tests" / "micropython" / "node_modules" / PACKAGE
UNCAUGHT = 99  # exit status of a run that ended with an exception (see micropython_run.mjs)
SCORER = Path(__file__).resolve().parents[2] / "runtime" / "boxwood_runtime" / "scorer.py"


class Unavailable(RuntimeError):
    """node or the MicroPython port cannot be found."""


def find_port(port: Optional[Union[str, Path]] = None) -> Optional[Path]:
    """The folder of the port's ``micropython.mjs``: ``port`` if given, else the
    environment variable BOXWOOD_MICROPYTHON_PORT, else the checkout's pinned copy."""
    for candidate in (port, os.environ.get(ENV_PORT), CHECKOUT_PORT):
        if not candidate:
            continue
        path = Path(candidate)
        if path.is_file() and path.name.endswith(".mjs"):
            path = path.parent
        if (path / "micropython.mjs").is_file():
            return path
        if port is not None and candidate is port:
            return None  # an explicit port that is not there: do not fall back silently
    return None


def find_node() -> Optional[str]:
    return shutil.which("node")


def unavailable_reason(port: Optional[Union[str, Path]] = None) -> Optional[str]:
    """None when MicroPython can be run here, else why not (one line)."""
    if find_node() is None:
        return "node is not on PATH"
    if find_port(port) is None:
        where = port or os.environ.get(ENV_PORT) or CHECKOUT_PORT
        return ("the MicroPython WebAssembly port (npm %s) is not at %s; install it with "
                "`npm ci --prefix tests/micropython` or point %s at it" % (PACKAGE, where, ENV_PORT))
    return None


def port_version(port: Optional[Union[str, Path]] = None) -> Optional[str]:
    """The npm version of the port (its package.json), or None."""
    where = find_port(port)
    if where is None:
        return None
    try:
        return json.loads((where / "package.json").read_text(encoding="utf-8")).get("version")
    except (OSError, ValueError):
        return None


def run(code: str, files: Optional[Mapping[str, Union[bytes, str]]] = None, heapsize: int = 8 << 20,
        pystack: int = 2048, port: Optional[Union[str, Path]] = None,
        timeout: float = 600) -> subprocess.CompletedProcess:
    """Run ``code`` as MicroPython's ``__main__`` after writing ``files`` ({path in the
    port: bytes or text}) into the port's file system. Returns the finished process
    (text stdout/stderr). Exit status: SystemExit's code, 0 at a normal end, 99
    (UNCAUGHT) after an uncaught exception or when the port could not start (e.g. a
    heap too small). Raises Unavailable when node or the port is missing."""
    reason = unavailable_reason(port)
    if reason:
        raise Unavailable(reason)
    job = {
        "heapsize": int(heapsize),
        "pystack": int(pystack),
        "files": {k: base64.b64encode(v.encode("utf-8") if isinstance(v, str) else bytes(v)).decode("ascii")
                  for k, v in (files or {}).items()},
        "code": code,
    }
    return subprocess.run([find_node(), str(RUNNER), str(find_port(port))], input=json.dumps(job),
                          capture_output=True, text=True, timeout=timeout)


# ----------------------------------------------------------------------------- footprint
# Steps run one after the other in one interpreter. The WebAssembly port never collects
# garbage while Python code runs (it cannot scan WebAssembly's own stack, so it grows its
# heap instead); a gc.collect() takes effect when its step returns to node. Hence the
# separate gc.collect() steps before each reading of live memory.
_FOOTPRINT_STEPS = [
    "import gc, json, sys\nsys.path.insert(0, '/box')\ngc.collect()",
    "base = gc.mem_alloc()\nimport scorer",
    "gc.collect()",
    # scorer.load() in its phases, as load() runs them (read the file; check the digest
    # and parse; build the model; self-check), with a collection between phases. At each
    # boundary the live heap is read (lives); each phase's allocations count whole (highs).
    "module = gc.mem_alloc()\nlives = [module]\nscorer.check_platform()\n"
    "with open('/box/model.json', 'rb') as fh:\n    data = scorer._read_bounded(fh, 1 << 28)\n"
    "highs = [gc.mem_alloc()]",
    "gc.collect()",
    "lives.append(gc.mem_alloc())\ndoc = scorer._verify_file_bytes(data)\nhighs.append(gc.mem_alloc())",
    "gc.collect()",
    "lives.append(gc.mem_alloc())\nmodel = scorer.Model(doc, scorer.DEFAULT_LIMITS)\nhighs.append(gc.mem_alloc())",
    "gc.collect()",
    "lives.append(gc.mem_alloc())\nok = model.self_check()[0]\nhighs.append(gc.mem_alloc())\nassert ok",
    "gc.collect()",
    "lives.append(gc.mem_alloc())\ndel data, doc",  # load() returns: its locals go
    "gc.collect()",
    "held = gc.mem_alloc()\nwith open('/box/record.json') as fh:\n    record = json.loads(fh.read())",
    "gc.collect()",
    "r0 = gc.mem_alloc()\nmodel.predict(record)\nr1 = gc.mem_alloc()",
    "print(json.dumps({'module': module - base, 'model': held - module, 'load_high': max(highs) - base, "
    "'load_low': max(lives) - base, 'record': r1 - r0}))",
]


def measure_footprint(artefact: bytes, record: List[Any], port: Optional[Union[str, Path]] = None,
                      scorer_source: Optional[bytes] = None) -> Dict[str, Any]:
    """Measure the scorer's heap use under MicroPython for ``artefact`` and one ``record``.

    Returns a dict of byte counts, all from ``gc.mem_alloc()``:

    * ``module_bytes``: live heap of the scorer module, imported from source
      (bytecode, functions, constants), after a collection.
    * ``model_bytes``: live heap of the loaded model (the parsed document and the
      trees built from it), after a collection.
    * ``record_bytes``: heap allocated while scoring one record (``predict``); the
      port does not collect during the call, so every allocation counts.
    * ``peak_bytes`` = module + model + record: the scorer's peak heap while scoring a
      record (an upper bound: a board's collector can only lower it).
    * ``load_peak_bytes`` and ``load_live_bytes``: bounds of the peak heap while
      loading, which runs in phases (read the file; check the digest and parse; build
      the model; self-check). Upper: what was live when a phase began plus all the
      phase allocated (the port collects only between phases). Lower: the largest
      live heap between phases. A board's collector lands in between.
    * ``micropython`` (the port's version) and ``how`` (one sentence).

    Raises Unavailable when node or the port is missing, RuntimeError when the run fails.
    """
    source = scorer_source if scorer_source is not None else SCORER.read_bytes()
    files = {"/box/scorer.py": source, "/box/model.json": artefact, "/box/record.json": json.dumps(record)}
    done = run(_FOOTPRINT_STEPS, files, port=port)
    if done.returncode != 0:
        last = (done.stderr.strip().splitlines() or ["exit status %d" % done.returncode])[-1]
        raise RuntimeError("the MicroPython footprint run failed: %s" % last)
    parts = json.loads(done.stdout.strip().splitlines()[-1])
    version = port_version(port)
    return {
        "peak_bytes": parts["module"] + parts["model"] + parts["record"],
        "load_peak_bytes": parts["load_high"],
        "load_live_bytes": parts["load_low"],
        "module_bytes": parts["module"],
        "model_bytes": parts["model"],
        "record_bytes": parts["record"],
        "micropython": version,
        "how": ("gc.mem_alloc() under MicroPython %s (npm %s: WebAssembly, 32-bit pointers, "
                "double-precision floats, run by node); live sizes after gc.collect(), allocations "
                "while loading and scoring counted whole (this port does not collect while Python "
                "runs: it collects between the load's phases), so the peaks are upper bounds" % (version, PACKAGE)),
    }
