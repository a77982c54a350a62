"""``boxwood keygen``: an Ed25519 key pair for signing bundles (boxwood.signing)."""
from .common import UsageError


def add(commands):
    p = commands.add_parser(
        "keygen", help="make an Ed25519 key pair to sign bundles with (NAME.key private, NAME.pub public)",
        description="Write NAME.key (the private key: PEM PKCS#8, unencrypted, file mode 0600; keep it on the "
                    "workstation, never in a bundle) and NAME.pub (the public key, PEM: install it on each box "
                    "outside the bundle folder, e.g. /etc/boxwood/trusted.pub, or pass it with box.py check "
                    "--trust). Sign with: boxwood bundle MODEL -o DIR --sign NAME.key. Existing files are never "
                    "overwritten. docs/bundle-signing.md explains what a signature protects.")
    p.add_argument("-o", "--output", required=True, metavar="NAME", help="writes NAME.key and NAME.pub")
    p.set_defaults(func=run)


def run(args):
    from ..signing import SigningError, keygen

    try:
        key_path, pub_path, kid = keygen(args.output)
    except SigningError as exc:
        raise UsageError(str(exc))
    print("wrote %s (private, mode 0600: keep it secret) and %s (public); key id %s" % (key_path, pub_path, kid))
    print("sign:    boxwood bundle MODEL -o DIR --sign %s" % key_path)
    print("on a box: python3 box.py check --trust %s   (or install it as /etc/boxwood/trusted.pub)" % pub_path)
    return 0
