"""`twistrate keys`: make a CURVE key pair (NAME.key public, NAME.key_secret secret) for non-loopback use."""

from __future__ import annotations

import argparse
import sys

from twistrate.service.security import write_keypair
from twistrate.solver.errors import ConfigError


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="twistrate keys",
        description="Make a CURVE key pair: OUT/NAME.key (public, give it to peers) and "
                    "OUT/NAME.key_secret (secret, mode 0600, keep it on this machine). "
                    "Needed for any endpoint beyond loopback (docs/protocol.md, section 13).")
    parser.add_argument("--out", required=True, metavar="DIR",
                        help="folder to write into (created if missing)")
    parser.add_argument("--name", required=True, help="key name, e.g. service or a client's name")
    parser.add_argument("--force", action="store_true", help="overwrite existing files of that name")
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        public_path, secret_path = write_keypair(args.out, args.name, force=args.force)
    except (ConfigError, OSError) as exc:
        print(f"twistrate keys: {exc}", file=sys.stderr)
        return 1
    print(f"public key: {public_path}")
    print(f"secret key: {secret_path} (mode 0600; never copy it to another machine)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
