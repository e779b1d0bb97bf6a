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

TOKEN = 8


def main() -> int:
    path = sys.argv[1]
    pending = b""
    while True:
        data = os.read(0, 65536)
        if not data:
            return 0
        data = pending + data
        whole = len(data) - len(data) % TOKEN
        pending = data[whole:]
        if not whole:
            continue
        try:
            fd = os.open(path, os.O_RDONLY)
        except FileNotFoundError:  # nothing written since the database was checkpointed
            pass
        else:
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        os.write(1, data[whole - TOKEN : whole])


if __name__ == "__main__":
    sys.exit(main())
