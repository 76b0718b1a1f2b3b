"""A structure-aware fuzzer for our container files (bundles, basis files, model files).

Random bytes stop at the container's CRCs; these mutations are made *inside* the structure
(a metadata value, a chunk body, the chunk list) and the file is then packed again with
valid CRCs, so that they reach the metadata and payload parsers. Used by ``test_fuzz.py``
(a short seeded run) and ``benchmarks/bench_fuzz.py`` (the long run with time and memory).
"""

from __future__ import annotations

import json
import time
import zlib
from dataclasses import dataclass, field

import numpy as np

from workbench.formats import container
from workbench.errors import WorkbenchError

HOSTILE = [0, -1, 1, 2, 7, 8.0, 0.5, -0.0, 1e308, -1e308, 2**31, 2**63, 10**30, 65536, 65537, 1 << 27,
           "", "x", "x" * 5000, "\ud800", "../../x", "a\\b", "\n", None, True, False, [], {}, [[[[]]]],
           {"a": 1}, "NaN", float("inf"), float("nan")]
EXTREME_BYTES = [b"\x00", b"\xff", b"\x7f", b"\x80", b"\x01"]


def _paths(obj, prefix=()):
    """Every (path) inside a JSON value, containers included."""
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(obj, list):
        for i, v in enumerate(obj[:50]):
            yield from _paths(v, prefix + (i,))


def _set(obj, path, value):
    if not path:
        return value
    parent = obj
    for key in path[:-1]:
        parent = parent[key]
    parent[path[-1]] = value
    return obj


def _get(obj, path):
    for key in path:
        obj = obj[key]
    return obj


def mutate_json(meta, rng):
    meta = json.loads(json.dumps(meta))
    paths = list(_paths(meta))
    path = paths[int(rng.integers(len(paths)))]
    op = int(rng.integers(6))
    target = _get(meta, path)
    if op == 0 or not path:
        return _set(meta, path, HOSTILE[int(rng.integers(len(HOSTILE)))])
    parent = _get(meta, path[:-1])
    if op == 1:
        del parent[path[-1]]
    elif op == 2 and isinstance(target, dict):
        target["zz_" + str(int(rng.integers(100)))] = HOSTILE[int(rng.integers(len(HOSTILE)))]
    elif op == 3 and isinstance(target, list) and target:
        target.extend([target[int(rng.integers(len(target)))]] * int(rng.integers(1, 4)))
    elif op == 4 and isinstance(target, (int, float)) and not isinstance(target, bool):
        parent[path[-1]] = target + int(rng.choice([-1, 1, 2, -2, 1000]))
    else:
        parent[path[-1]] = [target]
    return meta


def mutate_body(body: bytes, rng) -> bytes:
    b = bytearray(body)
    op = int(rng.integers(5))
    if not b or op == 0:
        b += bytes(rng.integers(0, 256, int(rng.integers(1, 64)), dtype=np.uint8))
    elif op == 1:
        del b[int(rng.integers(len(b))):]
    elif op == 2:
        for _ in range(int(rng.integers(1, 5))):
            b[int(rng.integers(len(b)))] = int(rng.integers(256))
    elif op == 3:  # a header field early in the body
        pos = int(rng.integers(min(len(b), 24)))
        width = int(rng.choice([1, 2, 4]))
        b[pos:pos + width] = EXTREME_BYTES[int(rng.integers(len(EXTREME_BYTES)))] * width
    else:
        pos = int(rng.integers(len(b)))
        b[pos:pos] = bytes(rng.integers(0, 256, int(rng.integers(1, 16)), dtype=np.uint8))
    return bytes(b)


def mutants(data: bytes, magic: bytes, version: int, rng, count: int):
    """``count`` structure-aware mutants of ``data``, each with valid CRCs."""
    chunks = container.unpack(data, magic, (version,), "file")
    meta = container.unpack_json(chunks[0][1], "file")
    for _ in range(count):
        new = list(chunks)
        for _ in range(int(rng.integers(1, 3))):
            kind = int(rng.integers(10))
            if kind < 5:
                new[0] = (b"META", container.pack_json(mutate_json(meta, rng)))
            elif kind < 9 and len(new) > 1:
                i = int(rng.integers(1, len(new)))
                new[i] = (new[i][0], mutate_body(new[i][1], rng))
            elif len(new) > 1:
                i, j = (int(v) for v in rng.integers(1, len(new), 2))
                op = int(rng.integers(3))
                if op == 0:
                    del new[i]
                elif op == 1:
                    new.append(new[i])
                else:
                    new[i], new[j] = new[j], new[i]
        if int(rng.integers(50)) == 0:  # now and then a raw deflate stream of hostile JSON
            new[0] = (b"META", zlib.compress(rng.choice([b"[" * 100_000, b"{}" * 200_000, b"9" * 5000])))
        yield container.pack(magic, version, new)


@dataclass
class Report:
    runs: int = 0
    refused: int = 0
    accepted: int = 0
    slowest: float = 0.0
    bugs: list = field(default_factory=list)

    def line(self, what: str) -> str:
        return (f"{what}: {self.runs} mutants, {self.refused} refused with our error, {self.accepted} read, "
                f"{len(self.bugs)} other exceptions, slowest {self.slowest:.2f} s")


def run(read, data: bytes, magic: bytes, version: int, *, seed: int, count: int, report: Report | None = None,
        on_each=None) -> Report:
    """Feed ``count`` mutants of ``data`` to ``read``; anything but a WorkbenchError is a bug."""
    report = report or Report()
    rng = np.random.default_rng(seed)
    for m in mutants(data, magic, version, rng, count):
        t = time.perf_counter()
        try:
            read(m)
            report.accepted += 1
        except WorkbenchError:
            report.refused += 1
        except Exception as exc:  # noqa: BLE001 - that is what we are looking for
            report.bugs.append((type(exc).__name__, str(exc)[:200], m))
        dt = time.perf_counter() - t
        report.slowest = max(report.slowest, dt)
        report.runs += 1
        if on_each is not None:
            on_each(m, dt)
    return report
