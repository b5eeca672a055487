"""Cache keys: one sha256 over a sequence of parts, each part framed so that ("ab", "c") and ("a", "bc") differ.
A part is text (UTF-8), bytes, or any other JSON-serialisable value (keys sorted). Every build, cross-build and
tune cache keys its entries with this one function. (The settings and content hashes printed in emitted files
are file-format fields with their own definitions, in derive.options and derive.printers.write.)"""
from __future__ import annotations

import hashlib
import json


def digest(*parts) -> str:
    h = hashlib.sha256()
    for p in parts:
        if isinstance(p, str):
            h.update(p.encode())
        elif isinstance(p, (bytes, bytearray)):
            h.update(p)
        else:
            h.update(json.dumps(p, sort_keys=True).encode())
        h.update(b"\0")
    return h.hexdigest()
