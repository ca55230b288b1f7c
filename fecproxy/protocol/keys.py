"""Pre-shared link keys: the key file's text format, key ids, sub-keys, and the file-mode rule.

Pure functions only: the config layer reads the file and its ``stat`` result and hands them here,
so the rules are tested without touching a disk.

* A key file holds 32 random bytes as 64 hexadecimal digits; whitespace anywhere is ignored (so a
  key split over lines, or with a trailing newline, reads the same).
* Both peers derive everything else from that one master key, so nothing but the file has to be
  configured or kept in step:

  - the **key id** (1 byte) names the key in every packet, so during a rollover a receiver knows
    which of its two keys to try;
  - the **fingerprint** (8 bytes, shown as 16 hex digits) names the key to people: ``fecproxy
    check`` and the logs print it so two sides' keys are compared with a chance of 1 in 2^64 of
    a wrong key passing, where the 1-byte id would miss one wrong key in 256;
  - the **MAC key** and the **AEAD key** are separate sub-keys, so the same bytes are never used by
    two algorithms.

  Each is one block of HKDF-Expand (RFC 5869 §2.3) with the master key as the pseudorandom key
  and a distinct ``info`` label.  The Extract step is skipped, as RFC 5869 §3.3 allows when the
  input is already a uniformly random key of hash length, which a key file made by
  ``fecproxy keygen`` is.  The key id is a PRF output, so it tells nothing useful about the key.
"""

from __future__ import annotations

import hmac
import stat

#: 32 bytes = 256 bits: the key size of HMAC-SHA-256's hash (RFC 2104 §3 recommends a key at
#: least as long as the hash output) and of ChaCha20-Poly1305 (RFC 8439 §2.8).
KEY_BYTES = 32
KEY_HEX_DIGITS = 2 * KEY_BYTES
#: Permission bits a key file must not have: any access by group or others.  A readable key lets
#: another local user forge packets; a writable one lets them swap it.
FORBIDDEN_MODE_BITS = 0o077
#: The largest key file worth reading: 64 digits with generous whitespace.  Anything longer is
#: surely the wrong file (a config, a log), and is not read whole into memory.
MAX_KEY_FILE_BYTES = 4096

#: HKDF-Expand ``info`` labels, one per derived value; the version suffix lets a later format
#: derive different values from the same key file.
_INFO_KEY_ID = b"fecproxy key id v1"
_INFO_FINGERPRINT = b"fecproxy key fingerprint v1"
#: 8 bytes: two different keys show the same fingerprint with probability 2^-64, so comparing
#: fingerprints by eye or by `fecproxy check SENDER RECEIVER` finds a wrong key; 16 hex digits
#: still fit a log line.  Like the key id it is a PRF output and tells nothing useful about the key.
FINGERPRINT_BYTES = 8
_INFO_MAC = b"fecproxy packet mac v1"
_INFO_AEAD = b"fecproxy packet aead v1"


class KeyFileError(ValueError):
    """A key file that cannot be used; the message names the file and what to do."""


class MasterKey:
    """A 32-byte pre-shared key that never shows itself in a repr, a log line or a traceback."""

    __slots__ = ("_secret", "fingerprint", "key_id")

    def __init__(self, secret: bytes):
        if len(secret) != KEY_BYTES:
            raise ValueError(f"a key is {KEY_BYTES} bytes, got {len(secret)}")
        self._secret = bytes(secret)
        self.key_id = key_id(self._secret)
        self.fingerprint = fingerprint(self._secret)

    def secret(self) -> bytes:
        """The key bytes, for deriving sub-keys; callers must not log or store them."""
        return self._secret

    def __repr__(self) -> str:
        return f"MasterKey({key_fingerprint_text(self)})"

    __str__ = __repr__

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, MasterKey):
            return NotImplemented
        return hmac.compare_digest(self._secret, other._secret)

    def __hash__(self) -> int:
        return hash(self.key_id)


def hkdf_expand_block(prk: bytes, info: bytes) -> bytes:
    """T(1) of HKDF-Expand with SHA-256 (RFC 5869 §2.3): HMAC(PRK, info ‖ 0x01), 32 bytes."""
    return hmac.digest(prk, info + b"\x01", "sha256")


def key_id(secret: bytes) -> int:
    """The 1-byte id both peers compute alike from the key itself (no configuration)."""
    return hkdf_expand_block(secret, _INFO_KEY_ID)[0]


def fingerprint(secret: bytes) -> str:
    """The key's 16-hex-digit fingerprint, computed alike on both sides (compare, never the key)."""
    return hkdf_expand_block(secret, _INFO_FINGERPRINT)[:FINGERPRINT_BYTES].hex()


def mac_key(master: MasterKey) -> bytes:
    """The HMAC-SHA-256 sub-key for packet tags."""
    return hkdf_expand_block(master.secret(), _INFO_MAC)


def aead_key(master: MasterKey) -> bytes:
    """The ChaCha20-Poly1305 sub-key for encrypted packets (distinct from the MAC key)."""
    return hkdf_expand_block(master.secret(), _INFO_AEAD)


def format_key_text(secret: bytes) -> str:
    """A key file's content: 64 lower-case hex digits and a newline."""
    if len(secret) != KEY_BYTES:
        raise ValueError(f"a key is {KEY_BYTES} bytes, got {len(secret)}")
    return secret.hex() + "\n"


def parse_key_text(text: str, source: str) -> MasterKey:
    """64 hex digits (whitespace ignored) -> the key; KeyFileError naming ``source`` otherwise.

    The message never repeats the file's content: a nearly right key is still a secret.
    """
    digits = "".join(text.split())
    remedy = f"expected {KEY_HEX_DIGITS} hexadecimal digits (make one with `fecproxy keygen {source}`)"
    if not digits:
        raise KeyFileError(f"{source}: the key file is empty; {remedy}")
    bad = next((position for position, char in enumerate(digits) if char not in "0123456789abcdefABCDEF"), None)
    if bad is not None:
        raise KeyFileError(
            f"{source}: the key holds a character that is not a hexadecimal digit (at digit {bad + 1}); {remedy}"
        )
    if len(digits) != KEY_HEX_DIGITS:
        raise KeyFileError(f"{source}: the key has {len(digits)} hexadecimal digits; {remedy}")
    return MasterKey(bytes.fromhex(digits))


def check_key_file_mode(st_mode: int, source: str) -> None:
    """Refuse anything but a regular file that only its owner may read or write.

    Takes ``os.stat(...).st_mode`` so the rule is pure; raises KeyFileError with the fix.
    """
    if not stat.S_ISREG(st_mode):
        raise KeyFileError(f"{source}: not a regular file; expected a key file made by `fecproxy keygen {source}`")
    loose = stat.S_IMODE(st_mode) & FORBIDDEN_MODE_BITS
    if loose:
        who = []
        if loose & 0o070:
            who.append("its group")
        if loose & 0o007:
            who.append("other users")
        raise KeyFileError(
            f"{source}: the key file is open to {' and '.join(who)} (mode {stat.S_IMODE(st_mode):04o}); "
            f"run `chmod 600 {source}` so only its owner can read it"
        )


def key_fingerprint_text(master: MasterKey) -> str:
    """What may be shown of a key: its id (already on the wire in every packet) and its
    fingerprint (what people compare between the two sides)."""
    return f"key id 0x{master.key_id:02x}, fingerprint {master.fingerprint}"


#: Permission bits a systemd credential must not have.  systemd writes a credential 0400 and
#: root-owned, then grants the service's user read access by a POSIX ACL entry, or, where the
#: file system has no ACLs, by making that user the owner (systemd src/core/exec-credential.c,
#: ``write_credential``: ``fchmod(fd, 0400)``, ``fd_add_uid_acl_permission(fd, uid, ACL_READ)``,
#: else ``fchown``).  ``stat`` shows an ACL's mask in the group bits, so such a file reads 0440
#: although no group may read it: group *read* is therefore allowed there, any write bit and any
#: access by others is not.
FORBIDDEN_CREDENTIAL_MODE_BITS = 0o037


def check_credential_mode(st_mode: int, st_uid: int, euid: int, source: str) -> None:
    """The rule for a key handed over by systemd in ``$CREDENTIALS_DIRECTORY`` (see
    FORBIDDEN_CREDENTIAL_MODE_BITS): a regular file, owned by root or by the user reading it,
    with no write bit for group or others and nothing for others."""
    if not stat.S_ISREG(st_mode):
        raise KeyFileError(f"{source}: not a regular file; expected the key file systemd's LoadCredential= passes")
    loose = stat.S_IMODE(st_mode) & FORBIDDEN_CREDENTIAL_MODE_BITS
    if loose:
        raise KeyFileError(
            f"{source}: the credential is open to other users (mode {stat.S_IMODE(st_mode):04o}); expected what "
            f"systemd's LoadCredential= makes (0400); check the credential directory is systemd's own"
        )
    if st_uid not in (0, euid):
        raise KeyFileError(
            f"{source}: the credential is owned by user id {st_uid}; expected root or this user ({euid}), as "
            f"systemd's LoadCredential= makes it"
        )
