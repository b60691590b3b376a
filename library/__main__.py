"""Administer the lab library from the command line: ``python -m library sign ROOT``.

``sign`` accepts files the administrator trusts: files saved by versions of fringegauge before the
metadata was signed, or signed with a key that was replaced. For each data file whose size and
sha256 still match its metadata and whose content is a valid file of its kind, the metadata is
rewritten with an HMAC from the server's key (the user it names is kept, marked as typed: nothing
proves who saved it). Files whose checksum does not match, links and special files are reported and
left alone; files already signed with the key are left alone.

    python -m library sign ROOT [--kind stacks] [--key-file F] [--dry-run]

The key file is ``--key-file``, else ``FRINGEGAUGE_LIBRARY_KEY_FILE``, else
``~/.config/fringegauge/library.key``. It must exist (the server creates it when it first opens
the library; a new key here would sign files the server refuses) and lie outside ROOT. Run this
as the account the server runs as, so it uses the server's key. Exit status 0 when it ran
(whatever it signed), 2 when it could not (no such folder, no usable key).
"""

from __future__ import annotations

import argparse
import sys

from .store import KEY_FILE_ENV, KINDS, InputError, load_or_create_key, sign_library


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m library", description="Administer the lab library.")
    commands = parser.add_subparsers(dest="command", required=True)
    sign = commands.add_parser(
        "sign", help="accept files saved before the metadata was signed",
        description="Sign the metadata of library files whose size and sha256 still match it (files saved by "
                    "older versions, or signed with a replaced key), so the server lists them again. Their "
                    "saver is kept and recorded as typed. Files that do not match are reported, not signed.")
    sign.add_argument("root", help="the lab library folder (as given to serve.py --library)")
    sign.add_argument("--kind", choices=KINDS, action="append",
                      help="only this kind (repeat for several); default: every kind")
    sign.add_argument("--key-file", help=f"the server's key file (default: ${KEY_FILE_ENV}, else "
                                         "~/.config/fringegauge/library.key); it must exist and lie outside ROOT")
    sign.add_argument("--dry-run", action="store_true", help="say what would be signed, change nothing")
    args = parser.parse_args(argv)
    try:
        key = load_or_create_key(args.key_file, library_root=args.root, create=False)
        lines = sign_library(args.root, kinds=args.kind, key=key, dry_run=args.dry_run)
    except InputError as exc:
        print(f"python -m library sign: {exc}", file=sys.stderr)
        return 2
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
