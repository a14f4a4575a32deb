"""The person's signing identity on the command line: the two options, and loading it (one place).

Every act a person signs from the command line (decide, approve, investigate, rebaseline) takes
their PKCS#12 file and its passphrase the same way: ``--passphrase-file`` (mode 0600), else the
environment variable LOTGATE_SIGNING_PASSPHRASE, else a prompt when a terminal is attached.
"""

from __future__ import annotations

import argparse
import getpass
import os
import sys
from pathlib import Path
from typing import Any

PASSPHRASE_ENV = "LOTGATE_SIGNING_PASSPHRASE"


def add_identity_arguments(parser: argparse.ArgumentParser, *, required: bool = True,
                           identity_help: str = "your PKCS#12 signing identity") -> None:
    """``--identity P12`` and ``--passphrase-file FILE``."""
    parser.add_argument("--identity", required=required, metavar="P12", help=identity_help)
    parser.add_argument("--passphrase-file", metavar="FILE",
                        help=f"file (mode 0600) holding the passphrase; else {PASSPHRASE_ENV} or a prompt")


def _typed_passphrase(args: argparse.Namespace) -> bytes | None:
    if args.passphrase_file or os.environ.get(PASSPHRASE_ENV):
        return None  # load_identity reads the environment variable, then the file
    if sys.stdin.isatty():
        return getpass.getpass("Passphrase of your signing identity: ").encode("utf-8")
    return None


def load_person_identity(args: argparse.Namespace) -> Any:
    """The person's identity from ``--identity`` and its passphrase (see the module docstring)."""
    from pipeline.records import signing

    return signing.load_identity(Path(args.identity), passphrase=_typed_passphrase(args),
                                 passphrase_file=Path(args.passphrase_file) if args.passphrase_file else None)
