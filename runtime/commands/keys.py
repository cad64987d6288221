"""`jogwire keys DIR`: make CURVE key pairs for a link that leaves this machine.

Writes, in DIR (created with mode 0700):

    arm.key, arm.key_secret          the arm side (sim or bridge): CURVE server
    runtime.key, runtime.key_secret  the operator side: CURVE client
    authorized/runtime.key           the clients the arm side lets in

The arm side needs arm.key_secret and authorized/; the runtime needs runtime.key_secret and
arm.key. Both take `--keys DIR`. Secret files are readable by their owner only; copy them
over a trusted channel. `--name NAME` adds more client pairs (each authorized).
"""

from __future__ import annotations

import argparse

from ..errors import ConfigError
from ..link.transport import CLIENT_KEY_NAME, SERVER_KEY_NAME, make_keys


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("dir", metavar="DIR", help="folder to write the keys into")
    parser.add_argument("--name", action="append", default=[], metavar="NAME",
                        help="an extra client key pair (repeatable), e.g. a second operator")
    parser.add_argument("--force", action="store_true", help="replace existing keys")


def run(args: argparse.Namespace) -> int:
    names = [SERVER_KEY_NAME, CLIENT_KEY_NAME, *args.name]
    for name in names:
        if not name.replace("-", "").replace("_", "").isalnum():
            raise ConfigError(f"key name {name!r}: use letters, digits, - and _", field="name")
    if len(set(names)) != len(names):
        raise ConfigError("key names repeat", field="name")
    written = make_keys(args.dir, names=tuple(names), force=args.force)
    for path in written:
        print(path)
    print(f"arm side (sim/bridge): --keys with {SERVER_KEY_NAME}.key_secret and authorized/; "
          f"operator side: --keys with {CLIENT_KEY_NAME}.key_secret and {SERVER_KEY_NAME}.key")
    return 0
