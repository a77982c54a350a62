# Scores rows with scorer.py and prints what it computed as exact bit patterns.
#
# Run unchanged by CPython and by MicroPython (tests/test_micropython.py) so that the
# two outputs can be compared line by line. The caller defines BOX (the folder holding
# scorer.py, model.json and rows.json) before this text, and optionally EXACT (force
# the scorer's exact float parser on or off) and COMPILED (load(..., compiled=True); then a
# line "compiled <reason>" follows "platform").
#
# rows.json is a list of rows in feature order; a float travels as the string
# "\x00" + 16 hex digits of its IEEE bits, so that no float parser is involved.
#
# Output lines:
#   platform <parser trusted: 1/0>
#   refused <reason>          (when the scorer refuses the artefact; nothing follows)
#   tree <hex of every threshold and leaf the scorer built, in tree order>
#   row <i> <raw scores> | <transformed outputs> | <prediction as JSON>   (or: row <i> E <field>)
import binascii
import json
import struct
import sys

sys.path.insert(0, BOX)  # noqa: F821 (defined by the caller)
import scorer  # noqa: E402

try:
    scorer.EXACT_FLOAT_PARSING = EXACT  # noqa: F821
except NameError:
    pass


def bits(v):
    if v != v:
        return "nan"  # NaN payloads are not part of the contract
    return binascii.hexlify(struct.pack("<d", v)).decode()


def decode(v):
    if isinstance(v, str) and v[:1] == "\x00":
        return struct.unpack("<d", binascii.unhexlify(v[1:]))[0]
    return v


scorer.check_platform()
print("platform %d" % (1 if scorer._parser_ok else 0))  # the probe's verdict on this Python's parser
try:
    COMPILED  # noqa: F821 (optionally defined by the caller: walk with compiled code)
except NameError:
    COMPILED = False
try:
    model = scorer.load(BOX + "/model.json", unknown_category="as_missing", compiled=COMPILED)  # noqa: F821
except scorer.ArtefactError as exc:
    print("refused %s" % (exc,))
    raise SystemExit(0)
if COMPILED:
    print("compiled %s" % model.compiled_reason)
for trees in model.trees_per_output:
    for root in trees:
        found = []
        stack = [root]
        while stack:  # depth first, left before right, without recursion
            node = stack.pop()
            if isinstance(node, tuple):  # a split: (feature, threshold, left, right, ...)
                found.append(bits(node[1]))
                stack.append(node[3])
                stack.append(node[2])
            else:
                found.append(bits(node))
        print("tree " + " ".join(found))
with open(BOX + "/rows.json") as fh:  # noqa: F821
    rows = json.loads(fh.read())
for i, row in enumerate(rows):
    row = [decode(v) for v in row]
    try:
        raw = model.raw_scores(model.prepare(row, i))
    except scorer.RecordError as exc:
        print("row %d E %s" % (i, exc.field))
        continue
    out = model.transform_raw(raw)
    label = model.predict_from_raw(raw)
    if isinstance(label, float):
        label = bits(label)
    elif isinstance(label, list):
        label = [bits(v) if isinstance(v, float) else v for v in label]
    print("row %d %s | %s | %s" % (i, " ".join(bits(v) for v in raw), " ".join(bits(v) for v in out),
                                   json.dumps(label)))
