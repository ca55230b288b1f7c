"""``fecproxy keygen PATH``: write a new pre-shared link key, readable by its owner only.

The key is 32 bytes from the operating system's CSPRNG (``secrets``), written as 64 hexadecimal
digits and a newline.  The file is created with ``O_CREAT | O_EXCL`` and mode 0600 in one step,
so it is never readable by others even for a moment, and an existing file (perhaps the key the
peer already has) is never overwritten.  Copy the file to the peer over a secure channel; both
configs then name it in ``auth.key_file``.

Exit status: 0 = written; 1 = not written (the file exists, or cannot be created).
"""

from __future__ import annotations

import argparse
import os
import secrets
import sys

from fecproxy.protocol.keys import KEY_BYTES, MasterKey, format_key_text

EXIT_WRITTEN = 0
EXIT_NOT_WRITTEN = 1
#: Owner read and write only; the daemon refuses a key file with any group or other bits.
KEY_FILE_MODE = 0o600


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.epilog = (
        f"exit status: {EXIT_WRITTEN} = key written, {EXIT_NOT_WRITTEN} = not written (file exists or "
        f"cannot be created)"
    )
    parser.add_argument("path", metavar="PATH", help="the key file to create; an existing file is never overwritten")


def write_key_file(path: str, secret: bytes) -> None:
    """Create ``path`` with mode 0600 and write the key; FileExistsError if it exists."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NOFOLLOW", 0)
    descriptor = os.open(path, flags, KEY_FILE_MODE)
    try:
        os.fchmod(descriptor, KEY_FILE_MODE)  # whatever the umask, exactly 0600
        os.write(descriptor, format_key_text(secret).encode("ascii"))
        os.fsync(descriptor)
    except BaseException:
        os.close(descriptor)
        os.unlink(path)
        raise
    os.close(descriptor)


def main(args: argparse.Namespace) -> int:
    path = args.path
    secret = secrets.token_bytes(KEY_BYTES)
    try:
        write_key_file(path, secret)
    except FileExistsError:
        print(
            f"{path}: already exists; refusing to overwrite a key (the peer may hold it). "
            f"Choose another path, or remove the file first if you really mean to replace it",
            file=sys.stderr,
        )
        return EXIT_NOT_WRITTEN
    except OSError as error:
        print(f"{path}: cannot create the key file: {error.strerror or error}", file=sys.stderr)
        return EXIT_NOT_WRITTEN
    key = MasterKey(secret)
    print(
        f"{path}: new key written (mode 0600, key id 0x{key.key_id:02x}, fingerprint {key.fingerprint}). Copy it "
        f"to the peer over a secure channel and set auth.key_file on both sides; `fecproxy check` shows the "
        f"fingerprint to compare (`fecproxy check SENDER.yaml RECEIVER.yaml` compares both sides')."
    )
    return EXIT_WRITTEN
