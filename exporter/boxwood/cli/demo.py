"""``boxwood demo``: the whole job on the invented cold-room data (boxwood.demo)."""
import argparse

from .common import positive_int


def add(commands):
    p = commands.add_parser(
        "demo", help="run the whole job on invented cold-room data: train, export, compare, score",
        description="Generate the invented cold-room data set (samples/generate.py; needs a source "
                    "checkout), train three scikit-learn models, export them, load them with the "
                    "device scorer, compare its raw scores with scikit-learn's on every row, and "
                    "score a sample CSV. Exit 1 if any comparison is not bit-identical.")
    p.add_argument("--out", metavar="DIR", help="directory for the files (default: a new temporary directory)")
    p.add_argument("--rows", type=_demo_rows, default=4000, metavar="N",
                   help="number of generated rows, at least 100 (default: %(default)s)")
    from ..demo import DEFAULT_MODELS, MODEL_KINDS

    p.add_argument("--models", default=",".join(DEFAULT_MODELS), metavar="KINDS",
                   help="comma-separated model kinds to train, or 'all' (default: %(default)s): "
                        + "; ".join("%s: %s" % kv for kv in MODEL_KINDS.items()))
    p.set_defaults(func=run)


def _demo_rows(text):
    value = positive_int(text)
    if value < 100:
        raise argparse.ArgumentTypeError("must be at least 100, got %d" % value)
    return value


def run(args):
    from ..demo import run

    return run(args.out, args.rows, models=[m.strip() for m in args.models.split(",") if m.strip()])
