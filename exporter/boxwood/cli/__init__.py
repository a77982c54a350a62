"""The ``boxwood`` command line.

    boxwood export MODEL.joblib -o model.json     # fitted scikit-learn model -> artefact
    boxwood export MODEL.joblib -o model.onnx     # ... -> exact ONNX graph (docs/onnx.md)
    boxwood export model.onnx -o model.json       # ONNX tree-ensemble file -> artefact
    boxwood score model.json readings.csv -o scored.csv
    boxwood inspect model.json [--json] [--micropython]
    boxwood bundle MODEL.joblib|model.json -o DIR [--zip] [--sign NAME.key]   # one folder to copy onto a box
    boxwood keygen -o NAME                       # NAME.key / NAME.pub to sign bundles
    boxwood verify MODEL.joblib model.json [--data FILE] [--report-json F] [--junit F]
    boxwood diff OLD NEW [--data FILE] [--json F] [--report-html F]
    boxwood demo [--out DIR] [--rows N]

``export`` loads a joblib or pickle file. Loading a pickle runs code stored in it:
only export model files that you or someone you trust made.

Exit codes (README.md, "Exit codes"; box.py keeps the same table): 0 success; 1 a
check failed (an artefact's self-check, a damaged boxwood artefact, a verify parity
check, a demo comparison); 2 bad usage or bad input (argparse's own usage errors, a
missing file, a file of another kind, an unsupported model, an unwritable output, a
missing optional dependency, ``score`` runs in which any row could not be scored).
User errors are reported as one ``boxwood: error: ...`` line on stderr, never as a
traceback.

One module per command (``cli/<name>.py``) with ``add(commands)``, which adds the
subparser and sets ``func`` to its ``run(args) -> exit code``; ``COMMANDS`` lists them.
Raise :class:`~.common.CheckFailed` for exit 1 and any ``ValueError`` or ``OSError`` for
exit 2; ``common`` holds what the commands share.
"""
import argparse
import io
import os
import sys

from .. import __version__
from . import bundle, demo, diff, export, inspect, keygen, score, verify
from .common import PROG, CheckFailed, UsageError, error

__all__ = ["main", "build_parser", "COMMANDS", "CheckFailed", "UsageError"]

COMMANDS = (export, score, inspect, bundle, keygen, verify, diff, demo)


def build_parser():
    import boxwood_runtime

    parser = argparse.ArgumentParser(
        prog=PROG,
        description="Export fitted scikit-learn tree ensembles to a documented artefact, score it "
                    "with a standard-library scorer, and check that both agree.",
        epilog="Exit codes: 0 success; 1 a check failed (a self-check, a damaged artefact, verify's parity); "
               "2 bad usage or bad input (a missing or wrong kind of file, a missing dependency). "
               "'%s COMMAND --help' describes a command." % PROG)
    parser.add_argument("--version", action="version",
                        version="%s %s (device scorer %s)" % (PROG, __version__, boxwood_runtime.__version__))
    commands = parser.add_subparsers(title="commands", metavar="COMMAND", dest="command")
    for command in COMMANDS:
        command.add(commands)
    return parser


def main(argv=None):
    """Run the command line; return the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors
        code = exc.code
        return code if isinstance(code, int) else (0 if code is None else 2)
    if getattr(args, "func", None) is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return args.func(args)
    except CheckFailed as exc:
        error(str(exc))
        return 1
    except BrokenPipeError:
        # The reader of our output went away (e.g. piped into head): stop quietly, exit 0.
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError, AttributeError, io.UnsupportedOperation):
            pass
        return 0  # as Unix filters do when the reader has all it wants (e.g. "| head -1")
    except (ValueError, OSError) as exc:
        # ArtefactError, RecordError, UnsupportedModel, StreamError and UsageError are
        # ValueErrors; a missing or unreadable file is an OSError.
        error(str(exc) or type(exc).__name__)
        return 2
    except KeyboardInterrupt:
        error("interrupted")
        return 130


if __name__ == "__main__":
    sys.exit(main())
