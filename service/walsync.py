"""The store's sync helper: a process that syncs the WAL file whenever the service asks.

Run by ``service.store`` as ``python -I -S walsync.py <path of the WAL file>``; it imports
nothing beyond ``os`` and ``sys``. It reads 8-byte requests (a count of transactions written,
big-endian) from its standard input and, for each read, syncs the file once and answers with the
largest count it read: every transaction counted up to it was written before the sync began, so
it is durable. It ends when its input closes; if a sync fails it ends at once, and the service
sees its output close and stops accepting writes.
"""

import os
import sys

TOKEN = 8  # bytes of one request or answer: a count of transactions, big-endian


def sync_file(path: str) -> bool:
    """Sync the file at ``path``; False when there is none (nothing was written since the
    database was checkpointed). The store's own threads sync through this function too."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return False
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    return True


def last_token(data: bytes) -> tuple[bytes, bytes]:
    """The last whole token in ``data`` (empty when there is none) and the part of a token
    after the whole ones (to be read on). The store reads the helper's answers with it too."""
    whole = len(data) - len(data) % TOKEN
    return data[max(0, whole - TOKEN) : whole], data[whole:]


def main() -> int:
    path = sys.argv[1]
    pending = b""
    while True:
        data = os.read(0, 65536)
        if not data:
            return 0
        last, pending = last_token(pending + data)
        if last:
            sync_file(path)
            os.write(1, last)


if __name__ == "__main__":
    sys.exit(main())
