"""boxwood device scorer: load a boxwood tree-ensemble artefact and score records.

This one file is the whole scoring core. It uses only the Python standard library
(json, hashlib, math, struct) and Python 3.8 syntax, so it can be copied alone onto
a box that has nothing else. Loading never executes anything from the artefact: it
is parsed as JSON, its sha256 digest is verified, every size is bounded, every index
is range-checked, every tree is checked to be a tree, and the artefact's own
self-check rows are scored and compared before the model is handed out.

    from scorer import load          # or: from boxwood_runtime import load
    model = load("model.json")
    model.predict({"ambient_c": 24.5, "room_type": "chiller", ...})
    model.predict([[24.5, "chiller", ...], [23.0, "freezer", ...]])

Decision rules (the artefact states them; format page: docs/artefact-format.md):
a numeric split sends a record left when ``x <= threshold``, after rounding ``x`` to
float32 where the artefact's ``compare_precision`` says so; a missing value follows
the node's ``missing_left`` flag; a categorical split sends a record left when the
category's code is listed for that node. Raw scores start at the base value and add
leaf values tree by tree in float64, which reproduces the source model bit for bit.
"""
import hashlib
import json
import math
import struct

try:  # CPython: a loaded model keeps its trees' node arrays as packed arrays (memory)
    from array import array as _array
    _NODE_ARRAYS = (list, _array)
except ImportError:  # MicroPython ports built without array: plain lists
    _array = None
    _NODE_ARRAYS = (list,)

FORMAT_NAME = "boxwood.tree-ensemble"
# 1: text trimmed, None = NaN; 2: text read as pandas does; 3: 2 plus what version 2 lacks
# (outputs.calibration, outputs.target_steps, the preprocessing steps "lookup" and
# "arithmetic": one-hot, target encoding, affine scalers). A writer says 3 only when an
# artefact uses one of them.
FORMAT_VERSIONS = (1, 2, 3)
SCORER_VERSION = "0.1.0"
DIGEST_KEY = "boxwood_digest"
_DIGEST_PREFIX = b'{"' + DIGEST_KEY.encode() + b'":"sha256:'

# Bounds applied while loading; pass your own to load() for a bigger or smaller box.
DEFAULT_LIMITS = {
    "max_bytes": 256 * 1024 * 1024,
    "max_features": 100000,
    "max_categories": 100000,
    "max_outputs": 10000,
    "max_trees": 200000,
    "max_nodes_per_tree": 1 << 22,
    "max_nodes": 1 << 26,
    "max_depth": 4096,
    "max_nesting": 64,  # brackets inside brackets in the file; checked before it is parsed
}
_NAN = float("nan")
_INF = float("inf")
_NONFINITE = {"inf": _INF, "-inf": -_INF}
# Parameters each post-transform takes (see transform()).
_TRANSFORM_PARAMS = {"identity": (), "exp": (), "logistic": (), "logistic_double": (), "softmax": (),
                     "samme": ("weight_total",), "isolation": ("denominator", "offset")}
# Classifier post-transforms whose raw scores hold one value per class, even for two.
_PER_CLASS = ("identity", "softmax", "samme")
# Transformed outputs (probabilities, exp) are compared with the self-check within
# this many units in the last place; raw scores must match exactly.
SELF_CHECK_ULPS = 8


class ArtefactError(ValueError):
    """The artefact is malformed, tampered with, too large, or of an unknown version."""


class RecordError(ValueError):
    """A record cannot be scored. ``row`` and ``field`` say where; ``reason`` says why."""

    def __init__(self, row, field, reason):
        self.row = row
        self.field = field
        self.reason = reason
        where = "record %s" % (row,) if row is not None else "record"
        if field is not None:
            where += ", field %r" % (field,)
        super().__init__("%s: %s" % (where, reason))  # MicroPython: ValueError.__init__ is absent


class PlatformError(ArtefactError):
    """This Python cannot reproduce the model's numbers (e.g. its floats are single
    precision). A kind of ArtefactError, so that callers that refuse an artefact refuse."""


# ----------------------------------------------------------------------------- platform
# The scorer also runs under MicroPython (1.2x, double-precision builds; docs/device.md).
# What MicroPython does differently is handled where it happens, marked "MicroPython".
# Float parsing: CPython's float() and json are correctly rounded; some MicroPython
# releases' are not (1.23 misreads e.g. 1e23 and 2.2250738585072014e-308 by an ulp or
# more, which would move thresholds). check_platform() probes the parser once with such
# strings; where it fails, artefacts are read by _json_exact(), which parses every
# non-integer number with exact integer arithmetic. None: decided by the probe;
# True / False: force the exact parser on / off.
EXACT_FLOAT_PARSING = None
# Decimal strings an incorrectly rounded parser tends to get wrong, with the bits of
# their correctly rounded float64 values (from CPython's correctly rounded float()).
_PARSER_PROBES = (
    ("1e23", 0x44B52D02C7E14AF6),
    ("2.2250738585072014e-308", 0x0010000000000000),
    ("2.4703282292062327e-324", 0x0000000000000000),
    ("123456789.12345679", 0x419D6F34547E6B75),
    ("3.4028234663852886e+38", 0x47EFFFFFE0000000),
    ("1.401298464324817e-45", 0x36A0000000000000),
    ("0.1", 0x3FB999999999999A),
    ("9007199254740993.0", 0x4340000000000000),
    ("5e-324", 0x0000000000000001),
    ("1.7976931348623157e+308", 0x7FEFFFFFFFFFFFFF),
)
_parser_ok = None


def check_platform():
    """Check that this Python computes in float64; return True when its own float parser
    is trusted for artefacts (False: the exact parser is used). Raises PlatformError on
    a build whose floats are narrower than float64 (MicroPython's single-precision and
    30-bit float builds): it could not reproduce the source model's comparisons."""
    global _parser_ok
    if 1.0 + 2.0 ** -52 == 1.0:
        raise PlatformError("this Python's floats are narrower than float64 (a single-precision build?); "
                            "the scorer needs double-precision floats to reproduce the model's decisions "
                            "(for MicroPython: a build with MICROPY_FLOAT_IMPL_DOUBLE)")
    if _parser_ok is None:
        got = json.loads("[" + ",".join(text for text, _ in _PARSER_PROBES) + "]")
        _parser_ok = all(struct.pack("<d", v) == struct.pack("<Q", bits)
                         for v, (_, bits) in zip(got, _PARSER_PROBES))
    return _parser_ok if EXACT_FLOAT_PARSING is None else not EXACT_FLOAT_PARSING


def _sha256_hex(*parts):
    h = hashlib.sha256()
    for part in parts:
        h.update(part)
    return "%02x" * 32 % tuple(h.digest())  # MicroPython's sha256 has no hexdigest()


def _bit_length(n):
    try:
        return n.bit_length()
    except AttributeError:  # MicroPython: an estimate at most 3 too high is enough below
        return len("%x" % n) * 4


def exact_float(text):
    """The float64 nearest to the decimal number ``text`` (ties to even), found with
    integer arithmetic only, so it is right whatever this Python's own parser does."""
    text = text.strip().lower()
    sign = 1 if text[:1] == "-" else 0
    if text[:1] in ("-", "+"):
        text = text[1:]
    exp10 = 0
    e = text.find("e")
    if e >= 0:
        exp10 = int(text[e + 1:])
        text = text[:e]
    dot = text.find(".")
    if dot >= 0:
        exp10 -= len(text) - dot - 1
        text = text[:dot] + text[dot + 1:]
    if not text or text.strip("0123456789"):
        raise ValueError("not a decimal number: %r" % (text,))
    digits = int(text)
    if digits == 0 or exp10 + len(text) < -330:  # zero, or below half the smallest float
        return struct.unpack("<d", struct.pack("<Q", sign << 63))[0]
    if exp10 > 310:
        return -_INF if sign else _INF
    num, den = (digits * 10 ** exp10, 1) if exp10 >= 0 else (digits, 10 ** -exp10)
    shift = 52 - (_bit_length(num) - _bit_length(den))  # value ~ q * 2**-shift
    while True:
        if shift > 1074:  # below the normal range: fewer significant bits
            shift = 1074
        q, r = divmod(num << shift, den) if shift >= 0 else divmod(num, den << -shift)
        d = den if shift >= 0 else den << -shift
        if q >= 1 << 53:
            shift -= 1
        elif q < 1 << 52 and shift < 1074:
            shift += 1
        else:
            break
    if 2 * r > d or (2 * r == d and q & 1):  # round half to even
        q += 1
    exp2 = -shift
    if q == 1 << 53:
        q >>= 1
        exp2 += 1
    if q < 1 << 52:  # subnormal (exp2 == -1074)
        bits = q
    elif exp2 + 1075 >= 2047:
        bits = 0x7FF << 52
    else:
        bits = ((exp2 + 1075) << 52) | (q - (1 << 52))
    return struct.unpack("<d", struct.pack("<Q", (sign << 63) | bits))[0]


_JSON_SPACE = b" \t\r\n"
_JSON_NUMBER = b"+-0123456789.eE"


def _json_exact(data):
    """json.loads for artefact bytes, with every non-integer number read by exact_float.
    Strings are decoded by the platform's json (only numbers are in question)."""
    if not isinstance(data, (bytes, bytearray)):
        data = data.encode("utf-8")
    value, i = _json_value(data, _json_space(data, 0))
    if _json_space(data, i) != len(data):
        raise ValueError("extra data at byte %d" % i)
    return value


def _json_space(data, i):
    while i < len(data) and data[i] in _JSON_SPACE:
        i += 1
    return i


def _json_value(data, i):
    c = data[i]
    if c == 0x7B or c == 0x5B:  # { or [
        close, out = (0x7D, {}) if c == 0x7B else (0x5D, [])
        i = _json_space(data, i + 1)
        if data[i] == close:
            return out, i + 1
        while True:
            item, i = _json_value(data, i)
            if c == 0x7B:
                i = _json_space(data, i)
                if not isinstance(item, str) or data[i] != 0x3A:
                    raise ValueError("bad object member at byte %d" % i)
                out[item], i = _json_value(data, _json_space(data, i + 1))
            else:
                out.append(item)
            i = _json_space(data, i)
            if data[i] == close:
                return out, i + 1
            if data[i] != 0x2C:
                raise ValueError("expected ',' at byte %d" % i)
            i = _json_space(data, i + 1)
    if c == 0x22:  # a string: up to the first quote not escaped by a backslash
        j = i
        while True:
            j = data.find(b'"', j + 1)
            if j < 0:
                raise ValueError("unterminated string at byte %d" % i)
            k = j
            while data[k - 1] == 0x5C:
                k -= 1
            if (j - k) % 2 == 0:
                return json.loads(data[i:j + 1]), j + 1
    for word, value in ((b"true", True), (b"false", False), (b"null", None)):
        if data[i:i + len(word)] == word:
            return value, i + len(word)
    j = i
    while j < len(data) and data[j] in _JSON_NUMBER:
        j += 1
    token = data[i:j].decode("ascii")
    if not token:
        raise ValueError("unexpected character at byte %d" % i)
    if "." in token or "e" in token or "E" in token:
        return exact_float(token), j
    return int(token), j


# ----------------------------------------------------------------------------- digest
def canonical_bytes(body):
    """The canonical JSON bytes of an artefact body (the document without its digest).

    Keys sorted, no spaces, ASCII only, no NaN or infinity. The digest is the sha256
    of these bytes, and a written artefact file is exactly
    ``{"boxwood_digest":"sha256:<hex>",`` followed by these bytes minus their ``{``.
    """
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True,
                      allow_nan=False, default=_json_default).encode("ascii")


def artefact_bytes(body):
    """The bytes of an artefact file for ``body``: digest first, then the canonical body."""
    content = canonical_bytes(body)
    digest = hashlib.sha256(content).hexdigest()
    return _DIGEST_PREFIX + digest.encode("ascii") + b'",' + content[1:] + b"\n"


def _verify_file_bytes(data, max_nesting=None):
    """Check the digest of a file in the canonical layout; return the parsed document.
    ``data`` is the file's bytes, or a one-item list holding them: the list is emptied once
    the bytes are hashed and decoded, so a big file's bytes and its parse are not held at
    once (the caller must keep no other reference). The nesting of the text is checked
    first (``max_nesting``, default DEFAULT_LIMITS'), so no parse or re-serialisation recurses
    deeper than that."""
    holder = data if isinstance(data, list) else [data]
    data = holder[0]
    if not isinstance(data, (bytes, bytearray)):
        _need(isinstance(data, str), "the artefact must be bytes or text")
        data = holder[0] = data.encode("utf-8", "replace")
    check_nesting(data, DEFAULT_LIMITS["max_nesting"] if max_nesting is None else max_nesting)
    end = len(data)
    while end and data[end - 1] in (10, 13):  # the final newline is not hashed
        end -= 1
    n = len(_DIGEST_PREFIX)
    if data[:n] == _DIGEST_PREFIX and data[n + 64:n + 66] == b'",':
        stated = data[n:n + 64].decode("ascii", "replace")
        # Hashed in place (no copy of the file: a small board's memory is tight).
        actual = _sha256_hex(b"{", memoryview(data)[n + 66:end])
        if actual != stated:
            raise ArtefactError("digest mismatch: the file says sha256 %s but its content hashes to %s; "
                                "the file was changed or damaged after export" % (stated, actual))
        if check_platform():  # json.loads reads text: decode, then let the bytes go
            try:
                data = data.decode("utf-8") if isinstance(data, (bytes, bytearray)) else data
            except UnicodeError:
                raise ArtefactError("the artefact is not valid UTF-8 text")
            holder[0] = None
        doc = _parse_json(data)
        if doc.get(DIGEST_KEY) != "sha256:" + stated:
            raise ArtefactError("the digest field is repeated or altered")
        return doc
    # Not in the canonical layout (e.g. pretty-printed by hand): verify by re-serialising.
    doc = _parse_json(data)
    verify_digest(doc)
    return doc


# Bytes that can change the nesting of JSON text: the brackets and the string quote.
_BRACKETS = b'"[]{}'
_NOT_BRACKETS = None


def check_nesting(data, limit):
    """Refuse JSON text (bytes) whose arrays and objects nest deeper than ``limit``, before
    any parser sees it (Python's json recurses once per level: a file of 100,000 "[" would
    end in RecursionError). Brackets inside strings do not count; text whose brackets do not
    pair up is refused too (it is not JSON). Cheap: strings are cut out with a few
    bytes.replace / translate passes, then one replace pass per level peels the innermost
    pairs, so a file of depth d costs about d passes over its brackets."""
    global _NOT_BRACKETS
    if 0x5C in data:  # backslash escapes: drop escaped backslashes, then escaped quotes
        data = bytes(data).replace(b"\\\\", b"").replace(b'\\"', b"")
    try:
        if _NOT_BRACKETS is None:
            _NOT_BRACKETS = bytes(b for b in range(256) if b not in _BRACKETS)
        step = 1 << 20  # in slices: translate allocates its input's size before it shrinks
        kept = b"".join(bytes(data[i:i + step]).translate(None, _NOT_BRACKETS) for i in range(0, len(data), step))
    except (AttributeError, TypeError):  # MicroPython: no bytes.translate
        kept = bytes(b for b in data if b in _BRACKETS)
    kept = kept.replace(b'""', b"")  # strings holding no bracket (two quotes in a row)
    if 0x22 in kept:  # strings holding brackets: keep what is outside the quotes
        outside = bytearray()
        i = 0
        while True:
            j = kept.find(b'"', i)
            if j < 0:
                outside.extend(kept[i:])
                break
            outside.extend(kept[i:j])
            i = kept.find(b'"', j + 1) + 1
            if i == 0:
                raise ArtefactError("not valid JSON: a string is not closed")
        kept = bytes(outside)
    kept = kept.replace(b"{", b"[").replace(b"}", b"]")
    depth = 0
    while kept:
        if depth >= limit:
            raise ArtefactError("the artefact nests arrays and objects deeper than max_nesting=%d" % limit)
        peeled = kept.replace(b"[]", b"")
        if len(peeled) == len(kept):
            raise ArtefactError("not valid JSON: its brackets do not pair up")
        kept = peeled
        depth += 1
    return depth


def _nesting_of(obj, limit):
    """Like check_nesting for an already parsed document (a dict passed to load), without
    recursion: refuse one nested deeper than ``limit``."""
    stack = [(obj, 1)]
    while stack:
        value, depth = stack.pop()
        if depth > limit:
            raise ArtefactError("the artefact nests arrays and objects deeper than max_nesting=%d" % limit)
        if isinstance(value, dict):
            stack.extend((v, depth + 1) for v in value.values() if isinstance(v, (dict, list, tuple)))
        elif isinstance(value, (list, tuple)):
            stack.extend((v, depth + 1) for v in value if isinstance(v, (dict, list, tuple)))


def _compact_tree(obj):
    """json object_hook: a tree's integer and float node arrays as packed ``array`` objects
    (4 or 8 bytes a node instead of a list slot plus an int or float object: the parsed
    document of a big forest stays near the file's size). Only a list whose every entry has
    exactly the expected type is packed; anything else stays a list, for the loader's checks
    to report. ``missing_left`` stays a list of booleans."""
    if "feature" in obj and "missing_left" in obj and "value" in obj and "output" in obj:
        for key, code, kind in _PACKED:
            seq = obj.get(key)
            if seq.__class__ is list and all(v.__class__ is kind for v in seq):
                try:
                    obj[key] = _array(code, seq)
                except OverflowError:  # an index beyond a C int: keep the list
                    pass
    return obj


_PACKED = (("feature", "i", int), ("left", "i", int), ("right", "i", int),
           ("threshold", "d", float), ("value", "d", float))


def _json_default(obj):
    if _array is not None and isinstance(obj, _array):
        return obj.tolist()  # packed node arrays (see _compact_tree) are written as lists
    raise TypeError("%r is not JSON serialisable" % (obj,))


def _parse_json(data):
    trusted = check_platform()
    try:
        if trusted:
            if isinstance(data, (bytes, bytearray)):
                data = data.decode("utf-8")
            if _array is None:
                doc = json.loads(data)
            else:
                try:
                    doc = json.loads(data, object_hook=_compact_tree)
                except TypeError:  # MicroPython's json.loads takes no object_hook
                    doc = json.loads(data)
        else:  # this Python's float parser is not correctly rounded (MicroPython 1.23)
            doc = _json_exact(data)
    except (ValueError, UnicodeError, IndexError) as exc:
        raise ArtefactError("not valid JSON (truncated or damaged file?): %s" % (exc,))
    if not isinstance(doc, dict):
        raise ArtefactError("the artefact must be a JSON object")
    return doc


def verify_digest(doc):
    """Check ``doc[DIGEST_KEY]`` against the canonical bytes of the rest of ``doc``."""
    stated = doc.get(DIGEST_KEY)
    if not isinstance(stated, str) or not stated.startswith("sha256:"):
        raise ArtefactError("the artefact has no %r field of the form 'sha256:<hex>'" % DIGEST_KEY)
    body = dict((k, v) for k, v in doc.items() if k != DIGEST_KEY)
    try:
        actual = "sha256:" + _sha256_hex(canonical_bytes(body))
    except (TypeError, ValueError) as exc:
        try:
            json.dumps({}, sort_keys=True, separators=(",", ":"))
        except TypeError:  # MicroPython's json cannot write canonical JSON
            raise ArtefactError("this Python's json module cannot re-serialise an artefact to check its "
                                "digest; use the artefact file exactly as exported (canonical layout)")
        raise ArtefactError("the artefact holds values JSON cannot carry: %s" % (exc,))
    if actual != stated:
        raise ArtefactError("digest mismatch: the artefact says %s but its content hashes to %s; "
                            "it was changed or damaged after export" % (stated, actual))


# ----------------------------------------------------------------------------- loading
def load(source, limits=None, unknown_category="error", self_check=True, compiled=False):
    """Load an artefact and return a :class:`Model`.

    ``source`` is a file path, the file's bytes, or the already parsed dict.
    ``limits`` overrides entries of DEFAULT_LIMITS. ``unknown_category`` is "error"
    (a category value the model never saw is a RecordError) or "as_missing" (route
    it as the source model does: scikit-learn treats unseen categories as missing).
    ``self_check`` scores the artefact's embedded reference rows and refuses the
    model unless raw scores match exactly and transformed outputs within
    SELF_CHECK_ULPS units in the last place. ``compiled`` walks the trees with Python code
    generated from the validated trees and compiled once (:meth:`Model.compile`; where the
    platform cannot, the model keeps walking the data and ``compiled_reason`` says why); the
    self-check then runs on the compiled walk.
    """
    check_platform()
    lim = dict(DEFAULT_LIMITS)
    if limits:
        lim.update(limits)
    if isinstance(source, dict):
        doc = source
        _nesting_of(doc, lim["max_nesting"])
        verify_digest(doc)
    else:
        if isinstance(source, (bytes, bytearray)):
            data = bytes(source)
        else:
            with open(source, "rb") as fh:
                data = _read_bounded(fh, lim["max_bytes"])
        if len(data) > lim["max_bytes"]:
            raise ArtefactError("the artefact is larger than max_bytes=%d" % lim["max_bytes"])
        holder = [data]
        data = None  # _verify_file_bytes drops the bytes once they are hashed and decoded
        doc = _verify_file_bytes(holder, lim["max_nesting"])
    try:
        model = Model(doc, lim, unknown_category)
    except ArtefactError:
        raise
    except _UNEXPECTED as exc:  # a check this scorer lacks: still an ArtefactError, never a traceback
        raise ArtefactError("%s: %s (%s)" % (UNEXPECTED_CONTENT, exc.__class__.__name__, exc))
    if compiled:
        model.compile()
    if self_check:
        ok, message = model.self_check()
        if not ok:
            raise ArtefactError("self-check failed: " + message)
    return model


# Errors that mean "a check is missing in this scorer". load() turns them into an
# ArtefactError whose message starts with UNEXPECTED_CONTENT (the fuzz campaign counts those
# apart: each is a check to add), so bad input never ends in a traceback.
UNEXPECTED_CONTENT = "the artefact holds content the scorer does not expect"
_UNEXPECTED = (TypeError, KeyError, IndexError, AttributeError, OverflowError, ZeroDivisionError,
               RuntimeError, MemoryError, ValueError)  # RecursionError is a RuntimeError


def _read_bounded(fh, limit):
    """The whole file if it holds at most ``limit`` bytes, else its first ``limit + 1``.
    Asks for the size first: MicroPython's read(n) allocates n bytes up front."""
    try:
        fh.seek(0, 2)
        size = fh.tell()
        fh.seek(0)
    except (OSError, AttributeError, ValueError):
        size = limit
    return fh.read(min(size, limit) + 1)


def _need(cond, message):
    if not cond:
        raise ArtefactError(message)


def _get(obj, key, kind, where):
    _need(isinstance(obj, dict), "%s must be an object" % where)
    _need(key in obj, "%s lacks %r" % (where, key))
    value = obj[key]
    ok = isinstance(value, kind) and not (kind is not bool and isinstance(value, bool))
    _need(ok, "%s.%s has the wrong type" % (where, key))
    return value


_TENTHS = (1.0, 0.1, 0.01, 0.001, 0.0001, 0.00001, 0.000001, 0.0000001, 0.00000001, 0.000000001,
           0.0000000001, 0.00000000001, 0.000000000001, 0.0000000000001, 0.00000000000001,
           0.000000000000001)


def json_float_15(text):
    """A JSON number with a point or an exponent as pandas.read_json reads it by default
    (``precise_float=False``: its vendored ujson): at most 15 fraction digits kept,
    ``(int + frac * 10**-digits) * sign``, then ``* 10.0 ** exponent`` (C ``pow``)."""
    sign = 1.0
    if text[:1] == "-":
        sign, text = -1.0, text[1:]
    k = max(text.find("e"), text.find("E"))
    exp, exp_sign = 0.0, 1.0
    if k >= 0:
        digits = text[k + 1:]
        text = text[:k]
        if digits[:1] in ("-", "+"):
            exp_sign = -1.0 if digits[0] == "-" else 1.0
            digits = digits[1:]
        for ch in digits:
            exp = exp * 10.0 + float(ord(ch) - 48)
    whole, _, frac = text.partition(".")
    value, n = 0.0, 0
    for ch in frac[:15]:
        value = value * 10.0 + float(ord(ch) - 48)
        n += 1
    value = (float(int(whole or "0")) + value * _TENTHS[n]) * sign
    if k >= 0:
        value = value * (10.0 ** (exp * exp_sign))
    return value


def _nan_for_null(row):
    """A reference row as the source model was given it: null (None) stands for NaN
    (the exporter writes NaN as null; a Python None is not written into rows)."""
    if isinstance(row, list):
        return [_NAN if v is None else v for v in row]
    return row


_DIGITS = "0123456789"
_INFINITIES = ("inf", "infinity")


def _number_text(text):
    """A CSV cell as ``pandas.read_csv`` reads a number column: spaces and tabs around
    it, an optional sign, then digits with an optional point (``1.``, ``.5``) and an
    optional exponent (``1e3``, ``2E-4``), or inf / infinity in any case. Anything
    else (``1_000``, ``0x10``, ``1,5``, other scripts' digits, which Python's float()
    takes) is a ValueError, as pandas then reads the whole column as text."""
    body = text.strip(" \t")
    core = body[1:] if body[:1] in ("+", "-") else body
    if core.lower() in _INFINITIES:
        return _INF if body[:1] != "-" else -_INF
    e = max(core.find("e"), core.find("E"))
    mant, exp = (core[:e], core[e + 1:]) if e >= 0 else (core, None)
    whole, _, frac = mant.partition(".")
    ok = bool(whole or frac) and not whole.strip(_DIGITS) and not frac.strip(_DIGITS)
    if exp is not None:
        exp = exp[1:] if exp[:1] in ("+", "-") else exp
        ok = ok and bool(exp) and not exp.strip(_DIGITS)
    if not ok:
        raise ValueError("not a number: %r" % (text,))
    return float(body)


def _number(value, where):
    """A JSON number, or one of the strings "inf" / "-inf", as a float."""
    if isinstance(value, str) and value in _NONFINITE:
        return _NONFINITE[value]
    _need(isinstance(value, (int, float)) and not isinstance(value, bool), "%s is not a number" % where)
    if isinstance(value, int):  # float() of a huge integer: OverflowError (MicroPython: infinity)
        _need(-_MAX_INT_FLOAT <= value <= _MAX_INT_FLOAT, "%s is an integer beyond the float64 range" % where)
    value = float(value)
    _need(value == value, "%s is NaN" % where)
    return value


_MAX_INT_FLOAT = (1 << 1024) - (1 << 970)  # integers above round to infinity (or overflow)


def _finite(value, where):
    """A JSON number that must be finite (not "inf"/"-inf"), as a float."""
    value = _number(value, where)
    _need(value != _INF and value != -_INF, "%s is not finite" % where)
    return value


_ARITHMETIC = ("sub", "div", "mul", "add", "clip")


def _arithmetic(step, at):
    """An "arithmetic" step's operations as (name, constants) pairs, checked."""
    seq = _get(step, "sequence", list, at)
    _need(0 < len(seq) <= 16, "%s.sequence must list 1 to 16 operations" % at)
    out = []
    for k, item in enumerate(seq):
        where = "%s.sequence[%d]" % (at, k)
        _need(isinstance(item, list) and len(item) >= 2 and item[0] in _ARITHMETIC,
              "%s must be [operation, constant] with an operation among %s" % (where, ", ".join(_ARITHMETIC)))
        _need(len(item) == (3 if item[0] == "clip" else 2), "%s has the wrong number of constants" % where)
        consts = tuple(_finite(c, where) for c in item[1:])
        out.append((item[0],) + consts)
    return tuple(out)


def _run_arithmetic(ops, v, row, label):
    """A scaler's float64 operations in order (NaN passes through, as in numpy)."""
    if v is None:
        return _NAN
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise RecordError(row, label, "expected a number, got %s %r" % (type(v).__name__, v))
    try:
        x = float(v)
    except OverflowError:  # an integer too large for a float
        raise RecordError(row, label, "%d is out of the float64 range" % v)
    if x == _INF or x == -_INF:
        raise RecordError(row, label, "infinity, which the scaler does not accept")
    for op in ops:
        name = op[0]
        if name == "sub":
            x = x - op[1]
        elif name == "div":
            x = x / op[1] if op[1] != 0.0 else _ieee_divide(x, op[1])
        elif name == "mul":
            x = x * op[1]
        elif name == "add":
            x = x + op[1]
        else:  # clip: numpy.clip keeps NaN
            if x < op[1]:
                x = op[1]
            elif x > op[2]:
                x = op[2]
    return x


def _ieee_divide(x, c):
    """x / 0.0 as IEEE 754 gives it (Python raises instead)."""
    if x != x or x == 0.0:
        return _NAN
    negative = (x < 0) != (math.copysign(1.0, c) < 0)
    return -_INF if negative else _INF

class Model:
    """A loaded, validated ensemble. Use :func:`load` to make one."""

    def __init__(self, doc, limits, unknown_category="error"):
        _need(unknown_category in ("error", "as_missing"),
              "unknown_category must be 'error' or 'as_missing'")
        _need(doc.get("format") == FORMAT_NAME, "not a boxwood tree-ensemble artefact (format %r)"
              % (doc.get("format"),))
        version = doc.get("format_version")
        _need(version in FORMAT_VERSIONS, "format_version %r is not one this scorer (%s) reads; it reads %s"
              % (version, SCORER_VERSION, ", ".join(str(v) for v in FORMAT_VERSIONS)))
        self.doc = doc
        self.format_version = version
        self.unknown_category = unknown_category
        self.task = _get(doc, "task", str, "artefact")
        _need(self.task in ("regression", "classification", "outlier_detection"), "unknown task %r" % self.task)
        self._read_inputs(_get(doc, "inputs", dict, "artefact"), limits)
        self._read_outputs(_get(doc, "outputs", dict, "artefact"), limits)
        self._read_ensemble(_get(doc, "ensemble", dict, "artefact"), limits)
        self._read_target_steps(doc["outputs"])

    # -- artefact parts ----------------------------------------------------------
    def _read_inputs(self, inputs, limits):
        self.compare_precision = _get(inputs, "compare_precision", str, "inputs")
        _need(self.compare_precision in ("float64", "float32"), "unknown compare_precision")
        self.missing_values = _get(inputs, "missing_values", str, "inputs")
        _need(self.missing_values in ("route", "reject"), "unknown missing_values policy")
        self.accepts_infinity = _get(inputs, "accepts_infinity", bool, "inputs")
        tokens = _get(inputs, "missing_tokens", list, "inputs")
        _need(all(isinstance(t, str) for t in tokens), "inputs.missing_tokens must be strings")
        self.missing_tokens = set(tokens)  # set, not frozenset: some MicroPython builds lack frozenset
        # Version 1: cells trimmed, None and NaN alike. Version 2: cells as written, and
        # JSON null in a text field read as the exporting pandas reads it ("nan"/"none").
        version = self.format_version
        self._trim = version == 1
        self.null_text = "nan"
        self.json_float = float  # how JSON Lines numbers with a point or exponent are read
        if version >= 2:
            self.null_text = _get(inputs, "null_text", str, "inputs")
            _need(self.null_text in ("nan", "none"), "inputs.null_text must be \"nan\" or \"none\"")
            _get(inputs, "text_reader", str, "inputs")
            numbers = _get(inputs, "json_numbers", str, "inputs")
            _need(numbers in ("exact", "15_decimals"), "inputs.json_numbers must be \"exact\" or \"15_decimals\"")
            if numbers == "15_decimals":
                self.json_float = json_float_15
        feats = _get(inputs, "features", list, "inputs")
        _need(0 < len(feats) <= limits["max_features"], "feature count out of bounds")
        self.feature_names = []
        self.categories = []  # per feature: None, or the category values in code order
        self._codes = []  # per feature: None, or {category value: code}
        for i, f in enumerate(feats):
            where = "inputs.features[%d]" % i
            name = _get(f, "name", str, where)
            kind = _get(f, "kind", str, where)
            _need(kind in ("numeric", "categorical"), "%s.kind is %r" % (where, kind))
            self.feature_names.append(name)
            if kind == "numeric":
                self.categories.append(None)
                self._codes.append(None)
                continue
            cats = _get(f, "categories", list, where)
            _need(0 < len(cats) <= limits["max_categories"], "%s has no or too many categories" % where)
            codes = {}
            for code, c in enumerate(cats):
                _need(isinstance(c, (str, int, float)) and not isinstance(c, bool),
                      "%s.categories[%d] must be a string or a number" % (where, code))
                _need(c not in codes, "%s.categories repeats %r" % (where, c))
                codes[c] = code
            self.categories.append(list(cats))
            self._codes.append(codes)
        _need(len(set(self.feature_names)) == len(self.feature_names), "feature names repeat")
        self.n_features = len(self.feature_names)
        self._read_preprocessing(inputs, feats, limits, self.format_version)

    @property
    def preprocesses(self):
        """True when records carry raw fields that preprocessing steps turn into the features."""
        return self._sources is not None

    def _read_preprocessing(self, inputs, feats, limits, version):
        """Raw record fields and each feature's source steps (a scikit-learn Pipeline's
        preprocessing), or, without "fields", records that hold the features themselves.

        Sets ``input_names`` (what a record carries), ``_sources`` (per feature: field
        index and steps, or None), ``_label`` (the name record errors use per feature),
        ``_unseen_missing`` (per feature: an unseen category code routes as missing, as
        scikit-learn does behind an encoder) and, per input, ``_known_text`` (strings
        that are category values) and ``_textual`` (may hold text)."""
        n = self.n_features
        self._label = list(self.feature_names)
        self._unseen_missing = [False] * n
        fields = inputs.get("fields")
        if fields is None:
            for i, f in enumerate(feats):
                _need("source" not in f, "inputs.features[%d] has a source but inputs lists no fields" % i)
            self.input_names = list(self.feature_names)
            self._sources = None
            self._known_text = [set(c for c in (cats or []) if isinstance(c, str)) for cats in self.categories]
            self._textual = [bool(k) for k in self._known_text]
            self._used = [True] * n
            return
        _need(isinstance(fields, list) and 0 < len(fields) <= limits["max_features"]
              and all(isinstance(f, str) for f in fields) and len(set(fields)) == len(fields),
              "inputs.fields must list distinct field names")
        self.input_names = list(fields)
        index = dict((name, i) for i, name in enumerate(fields))
        known = [set() for _ in fields]
        textual = [False] * len(fields)
        self._sources = []
        for j, f in enumerate(feats):
            where = "inputs.features[%d].source" % j
            src = _get(f, "source", dict, "inputs.features[%d]" % j)
            field = _get(src, "field", str, where)
            _need(field in index, "%s.field %r is not one of inputs.fields" % (where, field))
            fi = index[field]
            self._label[j] = field
            steps = []
            for k, step in enumerate(_get(src, "steps", list, where)):
                at = "%s.steps[%d]" % (where, k)
                op = _get(step, "op", str, at)
                if op == "impute":
                    value = step.get("value")
                    _need(isinstance(value, (str, int, float)) and not isinstance(value, bool),
                          "%s.value must be a number or a string" % at)
                    textual[fi] = textual[fi] or isinstance(value, str)
                    replaces = "both"  # version 1: None and NaN alike
                    if version >= 2:
                        replaces = _get(step, "replaces", str, at)
                        _need(replaces in ("nan", "none"), "%s.replaces must be \"nan\" or \"none\"" % at)
                    steps.append(("impute", value, replaces))
                    continue
                if op == "arithmetic" and version >= 3:
                    steps.append(("arithmetic", _arithmetic(step, at)))
                    continue
                _need(op == "encode" or (op == "lookup" and version >= 3),
                      "%s.op %r is not a step this scorer knows" % (at, op))
                cats = _get(step, "categories", list, at)
                _need(0 < len(cats) <= limits["max_categories"], "%s has no or too many categories" % at)
                codes = {}
                for code, c in enumerate(cats):
                    _need(isinstance(c, (str, int, float)) and not isinstance(c, bool) and c not in codes,
                          "%s.categories[%d] is not a new string or number" % (at, code))
                    codes[c] = float(code)
                    if isinstance(c, str):
                        known[fi].add(c)
                        textual[fi] = True
                unknown = step.get("unknown")
                _need(unknown == "error" or unknown is None or (isinstance(unknown, (int, float))
                                                                and not isinstance(unknown, bool)),
                      "%s.unknown must be \"error\", a number or null" % at)
                unknown = _NAN if unknown is None else (
                    unknown if unknown == "error" else _number(unknown, at + ".unknown"))
                missing = step.get("missing", "unknown")
                _need(missing in ("unknown", None) or (isinstance(missing, (int, float))
                                                       and not isinstance(missing, bool)),
                      "%s.missing must be a number or null" % at)
                missing = missing if missing == "unknown" else (
                    _NAN if missing is None else _number(missing, at + ".missing"))
                none = missing  # version 1: None as NaN
                if version >= 2:
                    none = step.get("none", "unknown")
                    _need(none == "unknown" or (isinstance(none, (int, float)) and not isinstance(none, bool)),
                          "%s.none must be a number" % at)
                    none = none if none == "unknown" else _number(none, at + ".none")
                if op == "lookup":  # the same matching; a category becomes its value, not its code
                    values = _get(step, "values", list, at)
                    _need(len(values) == len(cats), "%s.values must have one value per category" % at)
                    for c, value in zip(cats, values):
                        codes[c] = _finite(value, "%s.values" % at)
                    _need(unknown == "error" or unknown == unknown, "%s.unknown must be a number" % at)
                    _need(missing == "unknown" or missing == missing, "%s.missing must be a number" % at)
                    steps.append(("lookup", codes, unknown, missing, cats, none))
                    continue
                steps.append(("encode", codes, unknown, missing, cats, none))
                self._unseen_missing[j] = True
            self._sources.append((fi, tuple(steps)))
        self._known_text = [set(k) for k in known]  # set: some MicroPython builds lack frozenset
        self._textual = textual
        # fields no feature reads (dropped by the preprocessing): may be absent, any type
        self._used = [False] * len(fields)
        for fi, _ in self._sources:
            self._used[fi] = True
    def _read_outputs(self, outputs, limits):
        self.post_transform = _get(outputs, "post_transform", str, "outputs")
        _need(self.post_transform in _TRANSFORM_PARAMS, "unknown post_transform %r" % self.post_transform)
        params = outputs.get("post_transform_params", {})
        _need(isinstance(params, dict) and sorted(params) == sorted(_TRANSFORM_PARAMS[self.post_transform]),
              "post_transform %r needs the parameters %s" % (self.post_transform,
                                                             list(_TRANSFORM_PARAMS[self.post_transform])))
        self.post_transform_params = dict((k, _finite(v, "outputs.post_transform_params.%s" % k))
                                          for k, v in params.items())
        pp = self.post_transform_params
        # AdaBoost divides by its total estimator weight (a sum of positive weights); an isolation
        # forest divides path lengths by n_trees * c(max_samples) >= 0 (0 for max_samples=1,
        # where scikit-learn takes the quotient as 1: see transform()).
        _need(pp.get("weight_total", 1.0) > 0.0, "outputs.post_transform_params.weight_total must be > 0")
        _need(pp.get("denominator", 0.0) >= 0.0, "outputs.post_transform_params.denominator must be >= 0")
        self.output_names = _get(outputs, "names", list, "outputs")
        self.classes = outputs.get("classes")
        self.binary_rule = outputs.get("binary_rule")
        self.softmax_sum = outputs.get("softmax_sum", "sequential")
        _need(self.softmax_sum in ("sequential", "pairwise"), "outputs.softmax_sum must be \"sequential\" or "
              "\"pairwise\"")
        self.calibration = None
        if "calibration" in outputs:
            _need(self.format_version >= 3, "outputs.calibration needs format_version 3")
            self.calibration = _read_calibration(outputs["calibration"], self, limits)
        if self.task == "classification":
            _need(isinstance(self.classes, list) and len(self.classes) >= 2, "a classifier needs class labels")
            _need(self.post_transform in ("identity", "logistic", "logistic_double", "softmax", "samme"),
                  "post_transform %r is not one for classifiers" % self.post_transform)
            if len(self.classes) == 2 and self.post_transform not in _PER_CLASS:
                _need(self.binary_rule in ("raw_gt_0", "raw_ge_0"), "unknown binary_rule")
        elif self.task == "outlier_detection":
            _need(self.post_transform == "isolation" and self.classes == [-1, 1],
                  "an outlier detector has the isolation post-transform and the labels [-1, 1]")
        else:
            _need(self.task == "regression", "unknown task %r" % self.task)
            _need(self.post_transform in ("identity", "exp"), "post_transform %r is not one for regressors"
                  % self.post_transform)

    def _read_ensemble(self, ens, limits):
        self.combine = _get(ens, "combine", str, "ensemble")
        _need(self.combine in ("sum", "mean"), "unknown combine %r" % self.combine)
        base = _get(ens, "base_values", list, "ensemble")
        _need(0 < len(base) <= limits["max_outputs"], "base_values count out of bounds")
        self.base_values = [_finite(b, "ensemble.base_values[%d]" % i) for i, b in enumerate(base)]
        if self.task == "outlier_detection":  # path lengths: never negative (keeps 2 ** -q finite)
            _need(all(b >= 0.0 for b in self.base_values), "ensemble.base_values of an isolation forest must be >= 0")
        self.n_outputs = k = len(self.base_values)
        _need(len(self.output_names) == k, "outputs.names must name each of the %d outputs" % k)
        if self.task == "outlier_detection":
            _need(k == 1, "an outlier detector has one raw output")
        if self.task == "classification":
            want = 1 if len(self.classes) == 2 and self.post_transform not in _PER_CLASS else len(self.classes)
            if self.calibration is not None:  # fold-major: every fold's raw outputs in turn
                want *= len(self.calibration["folds"])
            _need(k == want, "%d classes need %d raw outputs, not %d" % (len(self.classes), want, k))
        _need(self.post_transform != "softmax" or k >= 2, "softmax needs two or more outputs")
        trees = _get(ens, "trees", list, "ensemble")
        _need(len(trees) <= limits["max_trees"], "more than max_trees=%d trees" % limits["max_trees"])
        self.trees_per_output = [[] for _ in range(k)]
        self.n_trees = len(trees)
        self.n_nodes = 0
        self.max_depth = 0
        for t, tree in enumerate(trees):
            output = _get(tree, "output", int, "ensemble.trees[%d]" % t)
            _need(0 <= output < k, "ensemble.trees[%d].output out of range" % t)
            root, n, depth = self._build_tree(tree, t, limits)
            self.n_nodes += n
            _need(self.n_nodes <= limits["max_nodes"], "more than max_nodes=%d nodes" % limits["max_nodes"])
            self.max_depth = max(self.max_depth, depth)
            self.trees_per_output[output].append(root)
        self._plan = [(self.base_values[j], tuple(self.trees_per_output[j])) for j in range(k)]

    def _read_target_steps(self, outputs):
        """outputs.target_steps (format version 3): element-wise steps after the
        post-transform, each {"op": "exp" | "expm1"} or {"op": "mul" | "add" | "sub" |
        "div", "values": [one number per output]} (see apply_target_steps)."""
        steps = outputs.get("target_steps", [])
        _need(isinstance(steps, list), "outputs.target_steps must be a list")
        _need(not steps or self.format_version >= 3, "outputs.target_steps needs format_version 3")
        _need(not steps or self.task == "regression", "outputs.target_steps belong to regressors only")
        self.target_steps = []
        for i, step in enumerate(steps):
            where = "outputs.target_steps[%d]" % i
            _need(isinstance(step, dict), where + " must be an object")
            op = step.get("op")
            _need(op in _TARGET_OPS, "%s: unknown op %r" % (where, op))
            if op in ("exp", "expm1"):
                _need(sorted(step) == ["op"], where + " takes no other keys")
                _need(op != "expm1" or _expm1 is not None, where + ": this platform's math module has no expm1")
                self.target_steps.append((op, None))
                continue
            _need(sorted(step) == ["op", "values"], where + " takes the keys op and values")
            values = step["values"]
            _need(isinstance(values, list) and len(values) == self.n_outputs,
                  "%s.values must hold %d numbers (one per output)" % (where, self.n_outputs))
            values = [_finite(v, "%s.values[%d]" % (where, j)) for j, v in enumerate(values)]
            _need(op != "div" or all(v != 0.0 for v in values), where + " divides by zero")
            self.target_steps.append((op, values))

    def _build_tree(self, tree, t, limits):
        """Check one tree's arrays and turn them into nested tuples (fast to walk).

        A leaf becomes its float value. A numeric split becomes
        ``(feature, threshold, left, right, missing_left)``; a categorical split becomes
        ``(feature, nan, left, right, (missing_left, codes_going_left))``: NaN makes both
        comparisons false, so the walk falls through to the categorical test.
        """
        where = "ensemble.trees[%d]" % t
        feature = _get(tree, "feature", _NODE_ARRAYS, where)
        n = len(feature)
        _need(0 < n <= limits["max_nodes_per_tree"], "%s node count out of bounds" % where)
        arrays = {}
        for key in ("threshold", "left", "right", "missing_left", "value"):
            arrays[key] = _get(tree, key, _NODE_ARRAYS, where)
            _need(len(arrays[key]) == n, "%s.%s has %d entries, expected %d" % (where, key, len(arrays[key]), n))
        cat_sets = tree.get("left_categories", {})
        _need(isinstance(cat_sets, dict), "%s.left_categories must be an object" % where)
        left, right = arrays["left"], arrays["right"]
        # Walk from the root; every node must be reached exactly once (a tree, no cycles).
        # The checks are written out inline (not through _need): a big forest has a million nodes.
        n_features = self.n_features
        max_depth = limits["max_depth"]
        depth_of = [-1] * n
        depth_of[0] = 0
        order = [0]
        append = order.append
        i = 0
        while i < len(order):
            node = order[i]
            i += 1
            f = feature[node]
            if f.__class__ is not int:
                _need(isinstance(f, int) and not isinstance(f, bool),
                      "%s.feature[%d] is not an integer" % (where, node))
            if f == -1:
                if left[node] != -1 or right[node] != -1:
                    _need(False, "%s: leaf %d has children" % (where, node))
                continue
            if not 0 <= f < n_features:
                _need(False, "%s.feature[%d]=%r out of range" % (where, node, f))
            d = depth_of[node]
            if d >= max_depth:
                _need(False, "%s deeper than max_depth=%d" % (where, max_depth))
            for child in (left[node], right[node]):
                if not (child.__class__ is int and 0 < child < n):
                    _need(isinstance(child, int) and not isinstance(child, bool) and 0 < child < n,
                          "%s: node %d has child %r out of range" % (where, node, child))
                if depth_of[child] != -1:
                    _need(False, "%s: node %d is reached twice (not a tree)" % (where, child))
                depth_of[child] = d + 1
                append(child)
        _need(len(order) == n, "%s has unreachable nodes" % where)
        for key in cat_sets:
            _need(isinstance(key, str) and 0 < len(key) <= 10 and not key.strip("0123456789") and int(key) < n
                  and feature[int(key)] >= 0,
                  "%s.left_categories names node %r, which is not a split" % (where, key))
        built = [None] * n
        values, thresholds, missing = arrays["value"], arrays["threshold"], arrays["missing_left"]
        categories = self.categories
        isolation = self.task == "outlier_detection"
        for node in reversed(order):  # children before parents
            f = feature[node]
            if f == -1:
                v = values[node]
                if v.__class__ is not float or v != v or v == _INF or v == -_INF:
                    v = _number(v, "%s.value[%d]" % (where, node))
                    _need(abs(v) != _INF, "%s.value[%d] is not finite" % (where, node))
                if v < 0.0 and isolation:
                    _need(False, "%s.value[%d] is negative; an isolation forest's leaves hold path lengths"
                          % (where, node))
                built[node] = v
                continue
            missing_left = missing[node]
            if missing_left is not True and missing_left is not False:
                _need(False, "%s.missing_left[%d] is not true/false" % (where, node))
            if categories[f] is None:
                if cat_sets and str(node) in cat_sets:
                    _need(False, "%s: node %d lists categories but splits a numeric feature" % (where, node))
                threshold = thresholds[node]
                if threshold.__class__ is not float or threshold != threshold:
                    threshold = _number(threshold, "%s.threshold[%d]" % (where, node))
                built[node] = (f, threshold, built[left[node]], built[right[node]], missing_left)
            else:
                key = str(node)
                _need(key in cat_sets, "%s: node %d splits a categorical feature but lists no categories"
                      % (where, node))
                codes = cat_sets[key]
                _need(isinstance(codes, list) and all(
                    isinstance(c, int) and not isinstance(c, bool) and 0 <= c < len(categories[f])
                    for c in codes), "%s.left_categories[%r] holds a bad category code" % (where, key))
                built[node] = (f, _NAN, built[left[node]], built[right[node]], (missing_left, set(codes)))
        return built[0], n, max(depth_of)

    # -- records -----------------------------------------------------------------
    def prepare(self, record, row=None):
        """Validate one record and return the list of values the trees compare.

        ``record`` is a dict keyed by input name (``input_names``: the features, or a
        pipeline's raw fields; other keys are ignored) or a sequence in that order. None
        or NaN means missing. Raises RecordError naming the row and the field.
        """
        names = self.input_names
        if isinstance(record, dict):
            values = []
            for i, name in enumerate(names):
                if name not in record:
                    if not self._used[i]:
                        values.append(None)  # the preprocessing drops this field
                        continue
                    raise RecordError(row, name, "the field is absent (write null for a missing value)")
                values.append(record[name])
        elif isinstance(record, (list, tuple)):
            if len(record) != len(names):
                raise RecordError(row, None, "has %d values, the model takes %d (%s)"
                                  % (len(record), len(names), ", ".join(names)))
            values = record
        else:
            raise RecordError(row, None, "expected a dict or a sequence, got %s" % type(record).__name__)
        if self._sources is not None:
            values = [self._derive(j, values, row) for j in range(self.n_features)]
        x = []
        for i, v in enumerate(values):
            codes = self._codes[i]
            if codes is None:
                x.append(self._numeric(v, i, row))
            else:
                x.append(self._category(v, i, row))
        if self.compare_precision == "float32":
            wide = x
            try:
                x = list(struct.unpack("<%df" % len(x), struct.pack("<%df" % len(x), *x)))
            except OverflowError:
                for i, v in enumerate(x):
                    try:
                        struct.pack("<f", v)
                    except OverflowError:
                        if not self.accepts_infinity:
                            raise RecordError(row, self._label[i],
                                              "%r is outside the float32 range this model compares in" % (v,))
                        x[i] = _INF if v > 0 else -_INF  # numpy's float32 cast overflows to infinity
                x = list(struct.unpack("<%df" % len(x), struct.pack("<%df" % len(x), *x)))
            if not self.accepts_infinity and (_INF in x or -_INF in x):
                for i, v in enumerate(x):  # MicroPython's struct overflows to infinity, never raises
                    if v == _INF or v == -_INF:
                        raise RecordError(row, self._label[i],
                                          "%r is outside the float32 range this model compares in" % (wide[i],))
        return x

    def _derive(self, j, values, row):
        """Feature ``j``'s value: its source field's value passed through its steps."""
        fi, steps = self._sources[j]
        v = values[fi]
        if v is None and not self._textual[fi]:
            v = _NAN  # a number column: pandas holds None as NaN
        for step in steps:
            is_none = v is None
            is_nan = isinstance(v, float) and v != v
            missing = is_none or is_nan
            if step[0] == "impute":
                replaces = step[2]
                if replaces == "none" and is_nan:  # SimpleImputer(missing_values=None) refuses NaN
                    raise RecordError(row, self._label[j], "NaN, which an imputer for None does not accept")
                if (is_nan and replaces != "none") or (is_none and replaces != "nan"):
                    v = step[1]
                continue
            if step[0] == "arithmetic":
                v = _run_arithmetic(step[1], v, row, self._label[j])
                continue
            _, codes, unknown, missing_code, cats, none_code = step
            if is_nan and missing_code != "unknown":
                v = missing_code
                continue
            if is_none and none_code != "unknown":
                v = none_code
                continue
            if not missing and (isinstance(v, bool) or not isinstance(v, (str, int, float))):
                raise RecordError(row, self._label[j], "expected a category value, got %s" % type(v).__name__)
            code = None if missing else codes.get(v)
            if code is not None:
                v = code
                continue
            if unknown == "error":
                shown = ", ".join(repr(c) for c in cats[:20])
                what = "unknown category %r" % (v,)
                if missing:
                    what = "a missing value (%s), which the encoder was not fitted to accept" % (
                        "None" if is_none else "NaN")
                raise RecordError(row, self._label[j], "%s (known: %s%s)" % (what, shown, ", ..." if len(cats) > 20
                                                                              else ""))
            v = unknown
        return v

    def _numeric(self, v, i, row):
        if v is None:
            return self._missing(i, row)
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise RecordError(row, self._label[i], "expected a number, got %s %r"
                              % (type(v).__name__, v))
        try:
            x = float(v)
        except OverflowError:  # an integer too large for a float
            raise RecordError(row, self._label[i], "%d is out of the float64 range" % v)
        if x != x:
            return self._missing(i, row)
        if x == _INF or x == -_INF:
            if not isinstance(v, float):  # MicroPython turns a huge integer into infinity
                raise RecordError(row, self._label[i], "%d is out of the float64 range" % v)
            if not self.accepts_infinity:
                raise RecordError(row, self._label[i], "infinity is not accepted by this model")
        return x

    def _category(self, v, i, row):
        if v is None or (isinstance(v, float) and v != v):
            return self._missing(i, row)
        code = self._codes[i].get(v) if not isinstance(v, bool) and isinstance(v, (str, int, float)) else None
        if code is None:
            if isinstance(v, bool) or not isinstance(v, (str, int, float)):
                raise RecordError(row, self._label[i], "expected a category value, got %s"
                                  % type(v).__name__)
            if self.unknown_category == "error" and not self._unseen_missing[i]:
                shown = ", ".join(repr(c) for c in self.categories[i][:20])
                raise RecordError(row, self._label[i], "unknown category %r (known: %s%s)"
                                  % (v, shown, ", ..." if len(self.categories[i]) > 20 else ""))
            return self._missing(i, row)
        return code

    def _missing(self, i, row):
        if self.missing_values == "reject":
            raise RecordError(row, self._label[i],
                              "the value is missing, and this model does not accept missing values")
        return _NAN

    def record_from_text(self, fields, row=None):
        """Turn a dict of strings (a CSV row) into a record as ``pandas.read_csv`` reads it.

        Version 2 artefacts: a cell equal to one of ``missing_tokens`` as written (no
        trimming) is NaN; a text field (one whose categories or imputed value are
        strings) keeps every other cell as the exact string, spaces and all, even when
        it looks like a number; any other field takes a number in pandas' grammar
        (spaces and tabs around it, a sign, digits with an optional point, an exponent,
        inf/infinity in any case). Version 1 artefacts: cells trimmed, missing tokens
        are None."""
        record = {}
        for i, name in enumerate(self.input_names):
            if not self._used[i]:
                continue  # dropped by the preprocessing
            if name not in fields:
                raise RecordError(row, name, "the column is absent")
            text = fields[name]
            if self._trim:
                if text is None or text.strip() in self.missing_tokens:
                    record[name] = None
                    continue
                text = text.strip()
                if text in self._known_text[i]:
                    record[name] = text
                    continue
            elif text is None or text in self.missing_tokens:
                record[name] = _NAN
                continue
            elif self._textual[i]:
                record[name] = text
                continue
            try:
                record[name] = _number_text(text)
            except ValueError:
                if not (self._textual[i] or (self._sources is None and self.categories[i] is not None)):
                    raise RecordError(row, name, "expected a number, got %r" % text)
                record[name] = text  # an unknown category; prepare() decides what happens
        return record

    def record_from_json(self, obj, row=None):
        """A JSON Lines object as ``pandas.read_json(..., lines=True)`` gives it: numbers
        and strings as they are, null as NaN, except in a text field when the exporting
        pandas reads null there as None (``inputs.null_text``). Other keys are kept."""
        if self._trim or self._sources is None:
            return obj  # None means missing for the trees alike
        record = dict(obj)
        for i, name in enumerate(self.input_names):
            if name in record and record[name] is None:
                record[name] = None if (self._textual[i] and self.null_text == "none") else _NAN
        return record

    # -- scoring -----------------------------------------------------------------
    def raw_scores(self, x):
        """Raw scores (one float per output) for a prepared record ``x``."""
        if self._compiled is not None:
            return self._compiled(x)
        return self._walk(x)

    # -- compiled mode -------------------------------------------------------------
    _compiled = None
    compiled_reason = "not asked for (load(..., compiled=True))"
    COMPILE_NESTING = 24  # deeper subtrees are walked as data (parsers limit nested blocks)

    def compile(self):
        """Generate Python source for the tree walk from the validated trees and compile it
        once; return True, or False when the platform cannot (``compiled_reason`` says why;
        the model keeps walking the data). Only integers (feature indexes, category codes)
        and ``repr`` of floats reach the source, never a string from the file, and each
        float's repr is checked to read back to the same bits first. The generated walk adds
        the same leaves in the same order as :meth:`raw_scores`' data walk."""
        consts = []
        try:
            source = self._source(consts)
        except ValueError as exc:
            self.compiled_reason = str(exc)
            return False
        try:
            code = compile(source, "<boxwood compiled model>", "exec")
            space = {"_walk_tree": _walk_tree, "_NAN": _NAN}
            exec(code, space)
        except NameError:  # MicroPython built without compile()/exec()
            self.compiled_reason = "this Python has no compile()/exec(); walking the data"
            return False
        except (SyntaxError, MemoryError, RuntimeError) as exc:
            self.compiled_reason = "the generated code did not compile here (%s); walking the data" % (
                type(exc).__name__,)
            return False
        self._deep = tuple(consts)
        space["_DEEP"] = self._deep
        self._compiled = space["raw"]
        self.compiled_reason = "compiled (%d lines)" % source.count("\n")
        return True

    def _source(self, deep):
        n = self.n_features
        names = ["x%d" % j for j in range(n)]
        lines = ["def raw(x):", "    %s = x" % (names[0] + "," if n == 1 else ", ".join(names))]
        mean = self.combine == "mean"
        for k, (total, roots) in enumerate(self._plan):
            acc = "a%d" % k
            lines.append("    %s = %s" % (acc, "0.0" if mean else _literal(total)))
            for root in roots:
                self._emit(root, acc, 1, lines, deep)
            if mean:
                lines.append("    %s = %s" % (acc, (_literal(total) + " + %s / %d" % (acc, len(roots))) if roots
                                              else _literal(total)))
        lines.append("    return [%s]" % ", ".join("a%d" % k for k in range(len(self._plan))))
        return "\n".join(lines) + "\n"

    def _emit(self, node, acc, depth, lines, deep):
        pad = "    " * depth
        if node.__class__ is not tuple:
            lines.append("%s%s += %s" % (pad, acc, _literal(node)))
            return
        if depth > self.COMPILE_NESTING:  # a deep subtree: walked as data
            lines.append("%s%s += _walk_tree(_DEEP[%d], x)" % (pad, acc, len(deep)))
            deep.append(node)
            return
        f, t, lo, hi, m = node
        v = "x%d" % f
        if m is True:  # missing goes left: right only when v > t (NaN fails it)
            lines.append("%sif %s > %s:" % (pad, v, _literal(t)))
            first, second = hi, lo
        elif m is False:
            lines.append("%sif %s <= %s:" % (pad, v, _literal(t)))
            first, second = lo, hi
        else:  # categorical: NaN takes the missing direction, a code goes left when in the set
            codes = sorted(m[1])
            inside = "(%s)" % "".join("%d," % c for c in codes)
            if m[0]:  # missing left: right only for a number outside the set
                lines.append("%sif %s == %s and %s not in %s:" % (pad, v, v, v, inside))
                first, second = hi, lo
            else:  # missing right: left only for a number inside the set
                lines.append("%sif %s == %s and %s in %s:" % (pad, v, v, v, inside))
                first, second = lo, hi
        self._emit(first, acc, depth + 1, lines, deep)
        lines.append("%selse:" % pad)
        self._emit(second, acc, depth + 1, lines, deep)

    def _walk(self, x):
        """The data walk: the trees' nested tuples, node by node."""
        out = []
        for total, roots in self._plan:
            acc = 0.0 if self.combine == "mean" else total
            for node in roots:
                while node.__class__ is tuple:
                    f, t, lo, hi, m = node
                    v = x[f]
                    if v <= t:
                        node = lo
                    elif v > t:
                        node = hi
                    elif m is True:  # v is NaN at a numeric split, missing goes left
                        node = lo
                    elif m is False:
                        node = hi
                    elif v != v:  # categorical split, missing value
                        node = lo if m[0] else hi
                    else:  # categorical split: is the category code in the left set?
                        node = lo if v in m[1] else hi
                acc += node
            if self.combine == "mean":
                acc = total + acc / len(roots) if roots else total
            out.append(acc)
        return out

    def _many(self, records):
        """True when ``records`` is a batch (a list of records), False for one record."""
        if isinstance(records, dict):
            return False
        if isinstance(records, (list, tuple)):
            return len(records) == 0 or isinstance(records[0], (dict, list, tuple))
        raise RecordError(None, None, "expected a record or a list of records, got %s" % type(records).__name__)

    def _apply(self, records, fn):
        if self._many(records):
            return [fn(self.raw_scores(self.prepare(r, i))) for i, r in enumerate(records)]
        return fn(self.raw_scores(self.prepare(records)))

    def decision_function(self, records):
        """Decision values per record: a float (one value) or a list of floats.

        For boosted models these are the raw scores (scikit-learn's
        ``decision_function``, or ``predict`` before the inverse link); for AdaBoost and
        isolation forests scikit-learn's ``decision_function``. Trees and forests have
        none in scikit-learn: a TypeError (see :attr:`has_decision_function`).
        """
        if not self.has_decision_function:
            raise TypeError("decision_function is not defined for this model (scikit-learn's trees and "
                            "forests have none); use predict or predict_proba")
        return self._apply(records, self._decision_out)

    @property
    def has_decision_function(self):
        """False for averaged trees and forests and for single trees, which have no
        decision_function in scikit-learn: probability-averaging classifiers, and
        regressors made of one tree per output with zero base values."""
        if self.calibration is not None:  # CalibratedClassifierCV has none
            return False
        if self.task == "outlier_detection" or self.post_transform not in ("identity",):
            return True
        if self.combine == "mean" or self.task == "classification":
            return False
        one_tree = all(len(t) <= 1 for t in self.trees_per_output)
        return not (one_tree and not any(self.base_values) and self.compare_precision == "float32")

    def score_samples(self, records):
        """Isolation forests: scikit-learn's ``score_samples`` (lower is more abnormal)."""
        if self.task != "outlier_detection":
            raise TypeError("score_samples is for outlier detectors; this model does %s" % self.task)
        return self._apply(records, lambda raw: self.transform_raw(raw)[0])

    def predict(self, records):
        """Predicted value (regression) or class label (classification) per record."""
        return self._apply(records, self.predict_from_raw)

    def predict_proba(self, records):
        """Class probabilities per record, in the order of ``classes`` (classifiers only)."""
        if self.task != "classification":
            raise TypeError("predict_proba is for classifiers; this model does %s" % self.task)
        return self._apply(records, self.proba_from_raw)

    def transform_raw(self, raw):
        """Apply the post-transform, then any target steps, to one list of raw scores (a
        calibrated classifier: its calibrated probabilities of all classes)."""
        if self.calibration is not None:
            return calibrated_probabilities(self.calibration, self.post_transform, self.softmax_sum, raw,
                                            len(self.classes))
        out = transform(self.post_transform, raw, self.post_transform_params, self.softmax_sum)
        return apply_target_steps(self.target_steps, out) if self.target_steps else out

    def decision_values(self, raw):
        """The decision values (always a list) for one list of raw scores (a calibrated
        classifier has none: its calibrated probabilities, which decide its label)."""
        if self.calibration is not None:
            return self.transform_raw(raw)
        if self.post_transform == "samme":
            return samme_decision(raw, self.post_transform_params["weight_total"])
        if self.post_transform == "isolation":
            return [self.transform_raw(raw)[0] - self.post_transform_params["offset"]]
        return list(raw)

    def exact_values(self, raw):
        """The values a device must reproduce bit for bit (the self-check's ``raw``): the
        raw scores, except for AdaBoost, whose raw vote sums scikit-learn never shows
        (there: its decision values, formed by exact divisions and one addition); for a
        calibrated classifier, every fold's own exact values, fold by fold."""
        if self.calibration is not None:
            return calibrated_exact_values(self.calibration, self.post_transform, raw)
        if self.post_transform == "samme":
            return samme_decision(raw, self.post_transform_params["weight_total"])
        return list(raw)

    @property
    def n_exact_values(self):
        """How many values :meth:`exact_values` returns per record."""
        return len(self.exact_values([0.0] * self.n_outputs))

    def _decision_out(self, raw):
        d = self.decision_values(raw)
        return d[0] if len(d) == 1 else d

    def predict_from_raw(self, raw):
        """The prediction (value, class label, or -1/1 for outliers) for one list of raw scores."""
        if self.task == "regression":
            out = self.transform_raw(raw)
            return out[0] if self.n_outputs == 1 else out
        return self.classes[self.class_index(raw)]

    def proba_from_raw(self, raw):
        """Class probabilities (all classes, in ``classes`` order) for one list of raw scores."""
        p = self.transform_raw(raw)
        return [1.0 - p[0], p[0]] if len(p) == 1 else p

    def class_index(self, raw):
        """Index into ``classes`` of the predicted class for raw scores ``raw``."""
        if self.task == "outlier_detection":  # scikit-learn: -1 where decision < 0
            return 0 if self.decision_values(raw)[0] < 0.0 else 1
        if self.calibration is not None:  # the first of the largest probabilities
            values = self.transform_raw(raw)
            best = 0
            for j in range(1, len(values)):
                if values[j] > values[best]:
                    best = j
            return best
        if self.n_outputs == 1:
            positive = raw[0] > 0.0 if self.binary_rule == "raw_gt_0" else raw[0] >= 0.0
            return 1 if positive else 0
        values = self.decision_values(raw)
        if len(values) == 1:  # AdaBoost, two classes: decision > 0 means the second
            return 1 if values[0] > 0.0 else 0
        best = 0
        for j in range(1, len(values)):
            if values[j] > values[best]:
                best = j
        return best

    # -- self-check and summary ----------------------------------------------------
    def self_check(self):
        """Score the artefact's reference rows; return (ok, one-line message).

        Raw scores (the exact values) must match bit for bit, transformed outputs and
        decision values within SELF_CHECK_ULPS, labels exactly (same value, same JSON type).
        ``inputs`` (the input names the rows are in order of), ``labels`` and ``decision`` are
        compared when the artefact carries them (boxwood writes them from 0.1.x on; older
        artefacts lack them and are checked on raw scores and outputs only)."""
        ref = self.doc.get("self_check")
        if not isinstance(ref, dict):
            return False, "the artefact carries no self_check section"
        try:
            return self._self_check(ref)
        except ArtefactError as exc:
            return False, str(exc)
        except _UNEXPECTED as exc:  # a check this scorer lacks: fail closed
            return False, "%s: %s (%s)" % (UNEXPECTED_CONTENT, exc.__class__.__name__, exc)

    def _self_check(self, ref):
        rows, raws, outs = ref.get("rows"), ref.get("raw"), ref.get("transformed")
        n = len(rows) if isinstance(rows, list) else 0
        extra = {}
        for key in ("labels", "decision"):
            if key in ref:
                extra[key] = ref[key]
                _need(isinstance(ref[key], list) and len(ref[key]) == n, "self_check.%s must be a list with one "
                      "entry per row" % key)
        if not (isinstance(rows, list) and isinstance(raws, list) and isinstance(outs, list)
                and len(rows) == len(raws) == len(outs) and rows):
            return False, "the self_check section is malformed"
        if "inputs" in ref and ref["inputs"] != self.input_names:
            return False, ("self_check.inputs %s differs from the model's inputs %s: its feature or field names "
                           "were changed" % (_short(ref["inputs"]), _short(self.input_names)))
        labels, decision = extra.get("labels"), extra.get("decision")
        _need(labels is None or self.task != "regression", "self_check.labels is for classifiers and outlier "
              "detectors")
        saved, self.unknown_category = self.unknown_category, "as_missing"
        try:
            for r, row in enumerate(rows):
                _need(isinstance(row, list), "self_check.rows[%d] is not a list" % r)
                try:
                    got = self.raw_scores(self.prepare(_nan_for_null(row), r))
                except RecordError as exc:
                    return False, "reference %s" % (exc,)
                want = _numbers(raws[r], "self_check.raw[%d]" % r)
                if self.exact_values(got) != want:
                    return False, "reference row %d: raw scores %r, expected %r" % (
                        r, self.exact_values(got), want)
                got_t = self.transform_raw(got)
                want_t = _numbers(outs[r], "self_check.transformed[%d]" % r)
                if len(got_t) != len(want_t):
                    return False, "reference row %d: %d outputs, expected %d" % (r, len(got_t), len(want_t))
                for a, b in zip(got_t, want_t):
                    if ulp_distance(a, b) > SELF_CHECK_ULPS:
                        return False, "reference row %d: output %r, expected %r" % (r, a, b)
                if decision is not None:
                    got_d = self.decision_values(got)
                    want_d = _numbers(decision[r], "self_check.decision[%d]" % r)
                    scale = max([abs(v) for v in got_t if v == v] + [abs(self.post_transform_params.get("offset", 0.0))])
                    if len(got_d) != len(want_d) or not all(_close(a, b, scale) for a, b in zip(got_d, want_d)):
                        return False, "reference row %d: decision values %r, expected %r" % (r, got_d, want_d)
                if labels is not None:
                    got_l = self.predict_from_raw(got)
                    if not _same_label(got_l, labels[r]):
                        return False, "reference row %d: label %r, expected %r" % (r, got_l, labels[r])
        finally:
            self.unknown_category = saved
        checked = "raw scores exact" + "".join(", " + k for k in ("labels", "decision", "inputs") if k in ref)
        return True, "%d reference rows reproduced (%s)" % (len(rows), checked)

    def summary(self):
        """A dict describing the model (task, features, trees, nodes, depth)."""
        return {
            "task": self.task,
            "n_features": self.n_features,
            "features": self.feature_names,
            "categorical": [n for n, c in zip(self.feature_names, self.categories) if c is not None],
            "n_outputs": self.n_outputs,
            "classes": self.classes,
            "n_trees": self.n_trees,
            "n_nodes": self.n_nodes,
            "max_depth": self.max_depth,
            "post_transform": self.post_transform,
            "compare_precision": self.compare_precision,
            "missing_values": self.missing_values,
            "digest": self.doc.get(DIGEST_KEY),
        }


def _numbers(values, where):
    """A list of JSON numbers (or "inf"/"-inf") as floats."""
    _need(isinstance(values, list), "%s is not a list of numbers" % where)
    return [_number(v, "%s[%d]" % (where, i)) for i, v in enumerate(values)]


def _close(a, b, scale):
    """Decision values: within SELF_CHECK_ULPS, or (an isolation forest's score minus its offset,
    which may cancel) within SELF_CHECK_ULPS + 1 units in the last place of ``scale``."""
    return ulp_distance(a, b) <= SELF_CHECK_ULPS or abs(a - b) <= (SELF_CHECK_ULPS + 1) * 2.0 ** -52 * scale


def _same_label(a, b):
    """Labels as JSON tells them apart: 1, 1.0, true and "1" are four different labels."""
    if isinstance(a, bool) or isinstance(b, bool):
        return a is b
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return isinstance(a, int) == isinstance(b, int) and a == b
    return type(a) is type(b) and a == b


def _short(names):
    text = repr(names)
    return text if len(text) <= 80 else text[:77] + "..."


# ----------------------------------------------------------------------------- math
def _literal(v):
    """A float as Python source that reads back to the same bits (repr; infinities as 1e999),
    or ValueError where this platform's repr does not round-trip (MicroPython may not)."""
    if v != v:
        raise ValueError("a NaN constant cannot be compiled")
    if v == _INF or v == -_INF:
        return "1e999" if v > 0 else "-1e999"
    text = repr(float(v))
    back = float(text)
    if back != v or (v == 0.0 and str(back) != str(v)):
        raise ValueError("this Python's float repr does not read back exactly (%s); walking the data" % text)
    return "(%s)" % text if text[0] == "-" else text


def _walk_tree(node, x):
    """One tree's leaf for a prepared record, walking its nested tuples: the compiled walk's
    hand-off for deep subtrees. ``Model._walk`` repeats this loop inline on purpose: a call
    per tree costs the data walk about 18% (measured on 250 depth-3 trees)."""
    while node.__class__ is tuple:
        f, t, lo, hi, m = node
        v = x[f]
        if v <= t:
            node = lo
        elif v > t:
            node = hi
        elif m is True:
            node = lo
        elif m is False:
            node = hi
        elif v != v:
            node = lo if m[0] else hi
        else:
            node = lo if v in m[1] else hi
    return node


def _exp(v):
    try:
        return math.exp(v)
    except (OverflowError, ValueError):  # MicroPython raises ValueError on overflow
        return _INF


_expm1 = getattr(math, "expm1", None)  # MicroPython builds without special functions lack it
_TARGET_OPS = ("exp", "expm1", "mul", "add", "sub", "div")


def apply_target_steps(steps, values):
    """Apply target steps (a list of (op, constants or None)) to one list of outputs, in
    order, element-wise: exp and expm1 (math's), or one IEEE *, +, - or / by the output's
    constant, as scikit-learn's TransformedTargetRegressor applies its inverse."""
    out = list(values)
    for op, c in steps:
        if op == "exp":
            out = [_exp(v) for v in out]
        elif op == "expm1":
            out = [_expm1_safe(v) for v in out]
        elif op == "mul":
            out = [v * c[j] for j, v in enumerate(out)]
        elif op == "add":
            out = [v + c[j] for j, v in enumerate(out)]
        elif op == "sub":
            out = [v - c[j] for j, v in enumerate(out)]
        elif op == "div":
            out = [v / c[j] for j, v in enumerate(out)]
        else:
            raise ValueError("unknown target step %r" % (op,))
    return out


def _expm1_safe(v):
    try:
        return _expm1(v)
    except (OverflowError, ValueError):  # overflow: +inf, as numpy.expm1 gives
        return _INF


def _logistic(v):
    # 1 / (1 + e^-v), the form scipy.special.expit uses; e^-v overflows to inf -> 0.0.
    return 1.0 / (1.0 + _exp(-v))


def _softmax(raw, order="sequential"):
    top = max(raw)
    e = [_exp(v - top) for v in raw]
    if order == "pairwise":
        total = pairwise_sum(e)
    else:
        total = 0.0
        for v in e:
            total += v
    return [v / total for v in e]


def pairwise_sum(values):
    """The sum numpy.sum gives for a contiguous row of float64 values (numpy's pairwise
    summation; scikit-learn's utils.extmath.softmax sums its exponentials so): fewer than 8
    values are added left to right from 0.0; up to 128, eight running sums over blocks of
    eight, combined as ((s0 + s1) + (s2 + s3)) + ((s4 + s5) + (s6 + s7)), then the rest left
    to right; more, the two halves (the first a multiple of 8 long) summed so and added.
    Written from numpy's loops_utils pairwise_sum; tests/test_contract.py checks it against
    numpy.sum on rows of 2 to 300 values."""
    n = len(values)
    if n < 8:
        total = 0.0
        for v in values:
            total += v
        return total
    if n <= 128:
        r = list(values[:8])
        i = 8
        stop = n - n % 8
        while i < stop:
            for j in range(8):
                r[j] += values[i + j]
            i += 8
        total = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]))
        while i < n:
            total += values[i]
            i += 1
        return total
    half = n // 2
    half -= half % 8
    return pairwise_sum(values[:half]) + pairwise_sum(values[half:])


def samme_decision(raw, weight_total):
    """AdaBoost (SAMME) decision values from the summed class votes, in scikit-learn's
    order of operations: divide by the total weight; for two classes, -d0 + d1."""
    d = [v / weight_total for v in raw]
    if len(d) == 2:
        return [-d[0] + d[1]]
    return d


def transform(name, raw, params=None, softmax_sum="sequential"):
    """Apply a post-transform to a list of raw scores and return a list. ``softmax_sum``:
    how a softmax adds its exponentials ("sequential" or "pairwise", see pairwise_sum)."""
    if name == "identity":
        return list(raw)
    if name == "exp":
        return [_exp(v) for v in raw]
    if name == "logistic":
        return [_logistic(v) for v in raw]
    if name == "logistic_double":
        return [_logistic(2.0 * v) for v in raw]
    if name == "softmax":
        return _softmax(raw, softmax_sum)
    if name == "samme":  # probabilities: softmax of the decision scaled by 1 / (K - 1)
        d = samme_decision(raw, params["weight_total"])
        if len(d) == 1:
            return _softmax([-d[0] / 2, d[0] / 2], softmax_sum)
        return _softmax([v / (len(d) - 1) for v in d], softmax_sum)
    if name == "isolation":  # score_samples: -(2 ** -(mean path length / c(max_samples)))
        den = params["denominator"]
        q = raw[0] / den if den != 0.0 else 1.0
        return [-(2.0 ** -q)]
    raise ValueError("unknown post_transform %r" % (name,))


# ----------------------------------------------------------------------------- calibration
# scikit-learn's CalibratedClassifierCV (its own copy of boxwood.contract's calibration part;
# docs/calibration.md): per fold, the response of the fold's classifier, one calibrator per
# class, the binary complement or the division by the row sum, then the mean of the folds.
_CALIBRATION_KEYS = {"isotonic": ("method", "x", "y"), "sigmoid": ("a", "b", "method")}


def _read_calibration(cal, model, limits):
    """Validate ``outputs.calibration``; return it with numbers as floats."""
    where = "outputs.calibration"
    _need(model.task == "classification", "%s belongs to classifiers only" % where)
    response = _get(cal, "response", str, where)
    _need(response in ("decision", "probability"), "%s.response must be \"decision\" or \"probability\""
          % where)
    _need(isinstance(model.classes, list) and len(model.classes) >= 2,
          "%s needs outputs.classes: a list of two or more class labels" % where)
    n = len(model.classes)
    norm = _get(cal, "normalisation", str, where)
    _need(norm == ("complement" if n == 2 else "row_sum"), "%s.normalisation %r does not fit %d classes"
          % (where, norm, n))
    folds = _get(cal, "folds", list, where)
    _need(0 < len(folds) <= limits["max_outputs"], "%s.folds: count out of bounds" % where)
    per = 1 if n == 2 else n
    out = []
    for f, fold in enumerate(folds):
        at = "%s.folds[%d]" % (where, f)
        params = _get(fold, "post_transform_params", dict, at)
        _need(sorted(params) == sorted(_TRANSFORM_PARAMS[model.post_transform]),
              "%s.post_transform_params must hold %s" % (at, list(_TRANSFORM_PARAMS[model.post_transform])))
        params = dict((k, _finite(v, "%s.post_transform_params.%s" % (at, k))) for k, v in params.items())
        _need(params.get("weight_total", 1.0) > 0.0, "%s.post_transform_params.weight_total must be > 0" % at)
        cals = _get(fold, "calibrators", list, at)
        _need(len(cals) == per, "%s.calibrators: %d classes need %d calibrators" % (at, n, per))
        read = []
        for c, one in enumerate(cals):
            ct = "%s.calibrators[%d]" % (at, c)
            method = _get(one, "method", str, ct)
            _need(method in _CALIBRATION_KEYS and sorted(one) == list(_CALIBRATION_KEYS[method]),
                  "%s must be {\"method\": \"isotonic\", \"x\", \"y\"} or {\"method\": \"sigmoid\", "
                  "\"a\", \"b\"}" % ct)
            if method == "sigmoid":
                a, b = _finite(one["a"], ct + ".a"), _finite(one["b"], ct + ".b")
                read.append(("sigmoid", a, b))
                continue
            xs, ys = _get(one, "x", list, ct), _get(one, "y", list, ct)
            _need(0 < len(xs) == len(ys) <= limits["max_nodes_per_tree"], "%s: x and y must be equally long "
                  "and hold 1 to max_nodes_per_tree knots" % ct)
            xs = [_finite(v, "%s.x[%d]" % (ct, i)) for i, v in enumerate(xs)]
            ys = [_finite(v, "%s.y[%d]" % (ct, i)) for i, v in enumerate(ys)]
            for i in range(1, len(xs)):
                _need(xs[i - 1] < xs[i], "%s.x[%d] does not increase strictly" % (ct, i))
            read.append(("isotonic", xs, ys))
        out.append((params, read))
    return {"response": response, "normalisation": norm, "folds": out}


def isotonic_interpolate(t, xs, ys):
    """IsotonicRegression(out_of_bounds="clip").predict for one value: clipped to the knots'
    range, then numpy.interp's formula (scipy's interp1d hands float64 knots to it): with
    xs[j] <= t < xs[j+1], ys[j] when t == xs[j], else slope * (t - xs[j]) + ys[j] where
    slope = (ys[j+1] - ys[j]) / (xs[j+1] - xs[j]) (NaN: from the right knot, then ys[j] if
    the two are equal); the last knot's ys; one knot: ys[0]."""
    n = len(xs)
    if n == 1:
        return ys[0]
    if t != t:
        return t
    if t <= xs[0]:
        return ys[0]
    if t >= xs[n - 1]:
        return ys[n - 1]
    lo, hi = 0, n - 1  # xs[lo] <= t < xs[hi] (no bisect module in MicroPython)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if xs[mid] <= t:
            lo = mid
        else:
            hi = mid
    if xs[lo] == t:
        return ys[lo]
    slope = (ys[lo + 1] - ys[lo]) / (xs[lo + 1] - xs[lo])
    v = slope * (t - xs[lo]) + ys[lo]
    if v != v:
        v = slope * (t - xs[lo + 1]) + ys[lo + 1]
        if v != v and ys[lo] == ys[lo + 1]:
            v = ys[lo]
    return v


def _calibrate(cal, t):
    if cal[0] == "isotonic":
        return isotonic_interpolate(t, cal[1], cal[2])
    return _logistic(-(cal[1] * t + cal[2]))  # expit(-(a * t + b))


def calibrated_exact_values(calibration, post_transform, raw):
    """Every fold's exact values side by side: its raw scores (AdaBoost: its decision values)."""
    folds = calibration["folds"]
    m = len(raw) // len(folds)
    out = []
    for f in range(len(folds)):
        r = raw[f * m:(f + 1) * m]
        out.extend(samme_decision(r, folds[f][0]["weight_total"]) if post_transform == "samme" else r)
    return out


def calibrated_probabilities(calibration, post_transform, softmax_sum, raw, n_classes):
    """CalibratedClassifierCV.predict_proba for one row of the folds' raw scores."""
    folds = calibration["folds"]
    m = len(raw) // len(folds)
    total = [0.0] * n_classes
    for f in range(len(folds)):
        params, cals = folds[f]
        r = raw[f * m:(f + 1) * m]
        if calibration["response"] == "decision":
            resp = samme_decision(r, params["weight_total"]) if post_transform == "samme" else list(r)
        else:
            resp = transform(post_transform, r, params, softmax_sum)
        if n_classes == 2:
            resp = resp[-1:]
        p = [0.0] * n_classes
        for c in range(len(cals)):
            p[c + 1 if n_classes == 2 else c] = _calibrate(cals[c], resp[c])
        if n_classes == 2:
            p[0] = 1.0 - p[1]
        else:
            s = pairwise_sum(p)  # numpy's row sum
            p = [v / s for v in p] if s != 0.0 else [1 / n_classes] * n_classes
        for j in range(n_classes):
            if 1.0 < p[j] <= 1.0 + 1e-5:
                p[j] = 1.0
            total[j] += p[j]
    return [v / len(folds) for v in total]


def ulp_distance(a, b):
    """How many float64 values lie between a and b (0 when equal, huge across NaN)."""
    if a == b:
        return 0
    if a != a or b != b:
        return 1 << 62

    def key(v):
        i = struct.unpack("<q", struct.pack("<d", v))[0]
        return i if i >= 0 else -(i & 0x7FFFFFFFFFFFFFFF)

    return abs(key(a) - key(b))
