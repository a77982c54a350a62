// Run one Python job under the MicroPython WebAssembly port, with node.
//
//   node micropython_run.mjs PORT_DIR_OR_MJS < job.json
//
// The port (npm package @micropython/micropython-webassembly-pyscript) cannot read the
// host's files: it has an in-memory file system of its own. The job therefore carries
// everything the run needs:
//
//   {"heapsize": bytes,                       // MicroPython GC heap (default 8 MiB)
//    "pystack": words,                        // Python call stack (default 2048, the port's)
//    "files": {"/box/scorer.py": "<base64>"}, // written into the port's file system first
//    "code": "python source"}                 // then run as __main__ (or a list of steps)
//
// The Python program's output goes to stdout/stderr as it is printed. Exit status:
// the code of a SystemExit (0 for none; a message is printed and gives 1, as CPython),
// 0 when the program ends normally, and 99 when it ends with any other exception (the
// traceback goes to stderr) or when the port itself fails to start.
// Used by boxwood.micropython (footprint measurement) and tests/test_micropython.py.
import { readFileSync, statSync } from "node:fs";
import { join } from "node:path";
import { pathToFileURL } from "node:url";

const UNCAUGHT = 99;

async function main() {
  let where = process.argv[2];
  if (!where) {
    process.stderr.write("usage: node micropython_run.mjs PORT_DIR_OR_MJS < job.json\n");
    process.exit(2);
  }
  if (statSync(where).isDirectory()) where = join(where, "micropython.mjs");
  const job = JSON.parse(readFileSync(0, "utf8"));
  const { loadMicroPython } = await import(pathToFileURL(where).href);
  const out = (data) => process.stdout.write(data);
  const err = (data) => process.stderr.write(data);
  let mp;
  try {
    mp = await loadMicroPython({ heapsize: job.heapsize || 8 * 1024 * 1024, pystack: job.pystack || 2048,
                                 stdout: out, stderr: err, linebuffer: false });
  } catch (e) {
    process.stderr.write("micropython_run: the port did not start: " + e + "\n");
    return UNCAUGHT;
  }
  for (const [path, b64] of Object.entries(job.files || {})) {
    const parts = path.split("/").filter((p) => p);
    let dir = "";
    for (const p of parts.slice(0, -1)) {
      dir += "/" + p;
      try { mp.FS.mkdir(dir); } catch (e) { /* exists */ }
    }
    mp.FS.writeFile(path, Buffer.from(b64, "base64"));
  }
  // "code" is one program, or a list of steps run one after the other in the same
  // interpreter. The port collects garbage only between top-level runs (while Python
  // code runs it grows its heap instead), so steps are how a caller gets a collection.
  const steps = Array.isArray(job.code) ? job.code : [job.code];
  try {
    for (const step of steps) mp.runPython(step);
  } catch (e) {
    const text = String(e && e.message !== undefined ? e.message : e);
    const exit = /(?:^|\n)SystemExit(?::[ ]?(.*))?\s*$/.exec(text);
    if (e && e.name === "PythonError" && exit) {
      const arg = (exit[1] || "").trim();
      if (arg === "" || arg === "None") return 0;
      if (/^-?\d+$/.test(arg)) return Number(arg);
      process.stderr.write(arg + "\n");  // sys.exit("message"): as CPython, print it, status 1
      return 1;
    }
    process.stderr.write(text.endsWith("\n") ? text : text + "\n");
    return UNCAUGHT;
  }
  return 0;
}

main().then((code) => {
  // Let stdout drain before leaving (process.exit can cut a piped stdout short).
  process.exitCode = code;
}, (e) => {
  process.stderr.write("micropython_run: " + (e && e.stack ? e.stack : e) + "\n");
  process.exitCode = UNCAUGHT;
});
