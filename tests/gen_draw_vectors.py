"""Generate docs/draw-vectors.json, the test vectors of draw specification v1.

    python tests/gen_draw_vectors.py            # write docs/draw-vectors.json
    python tests/gen_draw_vectors.py --check    # exit 1 if the file differs from the output

The specification is frozen: tests/test_draw_vectors.py checks the implementation against the
committed file, never the other way round. Regenerate only when adding vectors, and check with
``git diff`` that no existing vector changed.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import struct
import sys
from pathlib import Path
from typing import Any

from drawledger import _stream
from drawledger._normal import ppnd16
from drawledger.draw import Draw, bucket_assign

DOC = Path(__file__).resolve().parent.parent / "docs" / "draw-vectors.json"

CARDS = ["one-pot-pasta", "green-curry", "sheet-pan-salmon", "taco-night", "lentil-soup",
         "overnight-oats"]  # fmt: skip

# (kind, arguments) of the single-draw vectors; each runs on its own seed.
DRAWS: list[tuple[str, dict[str, Any]]] = [
    ("categorical", {"options": ["a", "b", "c"], "probs": [0.2, 0.5, 0.3]}),
    ("categorical", {"options": CARDS, "probs": [0.1, 0.1, 0.2, 0.2, 0.25, 0.15]}),
    ("categorical", {"options": [0, 1, 2, 3], "probs": [0.0, 0.5, 0.0, 0.5]}),
    ("categorical", {"options": [{"sku": 1}, {"sku": 2}], "probs": [0.7, 0.3]}),
    ("bernoulli", {"p": 0.5}),
    ("bernoulli", {"p": 0.05}),
    ("bernoulli", {"p": 0.95}),
    ("bernoulli", {"p": 1.0}),
    ("uniform", {"low": 0.0, "high": 1.0}),
    ("uniform", {"low": -2.5, "high": 7.25}),
    ("uniform", {"low": 15.0, "high": 45.0}),
    ("integers", {"low": 0, "high": 6}),
    ("integers", {"low": -10, "high": 10}),
    ("integers", {"low": 1000, "high": 1001}),
    ("integers", {"low": 0, "high": 2**53}),
    ("normal", {"mean": 0.0, "sd": 1.0}),
    ("normal", {"mean": 30.0, "sd": 5.0}),
    ("normal", {"mean": -1.5, "sd": 0.25}),
    ("lognormal", {"mu": 0.0, "sigma": 0.35365}),
    ("lognormal", {"mu": 3.4, "sigma": 0.5}),
    ("lognormal", {"mu": -1.0, "sigma": 1.2}),
    ("softmax", {"options": CARDS, "scores": [1.6, 0.7, 1.8, 0.2, 1.1, 0.9], "temperature": 0.7}),
    ("softmax", {"options": ["x", "y", "z"], "scores": [0.0, 0.0, 0.0], "temperature": 1.0}),
    ("softmax", {"options": ["x", "y"], "scores": [400.0, -300.0], "temperature": 0.05}),
    ("softmax", {"options": CARDS, "scores": [1.6, 0.7, 1.8, 0.2, 1.1, 0.9], "temperature": 5.0}),
    ("epsilon_greedy", {"options": CARDS, "scores": [1.6, 0.7, 1.8, 0.2, 1.1, 0.9],
                        "epsilon": 0.1}),
    ("epsilon_greedy", {"options": ["a", "b", "c", "d"], "scores": [2.0, 5.0, 5.0, 1.0],
                        "epsilon": 0.3}),
    ("epsilon_greedy", {"options": ["a", "b", "c"], "scores": [1.0, 2.0, 3.0], "epsilon": 1.0}),
    ("epsilon_greedy", {"options": ["a", "b", "c"], "scores": [1.0, 2.0, 3.0], "epsilon": 0.0}),
    ("slate", {"options": CARDS, "weights": [3.0, 1.0, 2.0, 0.5, 1.5, 2.0], "k": 3}),
    ("slate", {"options": ["a", "b", "c"], "weights": [1.0, 1.0, 1.0], "k": 3}),
    ("slate", {"options": ["a", "b", "c", "d"], "weights": [0.0, 2.0, 1.0, 1.0], "k": 2}),
    ("slate", {"options": list(range(12)), "weights": [float(i + 1) for i in range(12)],
               "k": 10}),
]  # fmt: skip

# Draws made in order on one seed: uniforms are consumed across draws and blocks.
SEQUENCE: list[tuple[str, dict[str, Any]]] = [
    ("bernoulli", {"p": 0.3}),
    ("softmax", {"options": CARDS, "scores": [1.6, 0.7, 1.8, 0.2, 1.1, 0.9], "temperature": 0.7}),
    ("slate", {"options": CARDS, "weights": [3.0, 1.0, 2.0, 0.5, 1.5, 2.0], "k": 4}),
    ("lognormal", {"mu": 3.4, "sigma": 0.35365}),
    ("integers", {"low": 1, "high": 7}),
    ("uniform", {"low": 0.0, "high": 10.0}),
    ("normal", {"mean": 0.0, "sd": 2.0}),
    ("categorical", {"options": ["a", "b"], "probs": [0.25, 0.75]}),
]

BUCKETS: list[tuple[str, dict[str, float], str]] = [
    ("shopper-000017", {"control": 0.5, "treatment": 0.5}, "reminder-test-2026"),
    ("shopper-000018", {"control": 0.5, "treatment": 0.5}, "reminder-test-2026"),
    ("shopper-000019", {"control": 0.5, "treatment": 0.5}, "reminder-test-2026"),
    ("shopper-000017", {"a": 0.2, "b": 0.3, "c": 0.5}, "card-layout"),
    ("shopper-000042", {"a": 0.2, "b": 0.3, "c": 0.5}, "card-layout"),
    ("basket-9f31", {"off": 0.9, "on": 0.1}, "free-delivery-banner"),
    ("rider-17", {"only": 1.0}, "single-arm"),
    ("épicerie-ü", {"control": 0.5, "treatment": 0.5}, "unicode-check"),
]

# Probabilities that exercise the three branches of AS241 and the ends of the stream.
PPND16_POINTS = [
    2.0**-54, 1e-300, 1e-20, 1e-12, 1.4e-11, 1e-6, 0.001, 0.025, 0.05, 0.075, 0.0750001, 0.1,
    0.3, 0.5, 0.6, 0.9, 0.924999, 0.925, 0.95, 0.975, 0.999, 1 - 1e-9, 1 - 2.0**-52,
    1 - 2.0**-53,
]  # fmt: skip

# 64-bit words whose mapping shows the rounding of ((x >> 11) + 0.5) * 2**-53.
WORDS = [0, 2047, 2048, 2**63 - 1, 2**63, 2**63 + 2048, 2**64 - 6144, 2**64 - 4096, 2**64 - 2049,
         2**64 - 2048, 2**64 - 1]  # fmt: skip


def seed_for(label: str) -> bytes:
    """A fixed seed for a vector: 16 bytes of blake2b of its label."""
    return hashlib.blake2b(label.encode(), digest_size=16).digest()


def run_draw(draw: Draw, kind: str, args: dict[str, Any]) -> dict[str, Any]:
    getattr(draw, kind)(**args)
    rec = draw.records[-1]
    return {
        "kind": kind,
        "args": rec.args,
        "uniforms": rec.u,
        "value": rec.value,
        "prob": rec.prob,
        "is_density": rec.is_density,
    }


def vectors() -> dict[str, Any]:
    words = [{"x": f"{x:016x}", "u": _stream.to_unit(x)} for x in WORDS]
    stream = []
    for i in range(3):
        seed = seed_for(f"stream-{i}")
        for b in (0, 1):
            digest = hashlib.blake2b(b.to_bytes(8, "little"), digest_size=64, key=seed,
                                     person=_stream.STREAM_PERSON).digest()  # fmt: skip
            stream.append({
                "seed": seed.hex(), "block": b, "digest": digest.hex(),
                "words": [f"{x:016x}" for x in struct.unpack("<8Q", digest)],
                "uniforms": _stream.block(seed, b),
            })  # fmt: skip
    ppnd = [{"p": p, "z": ppnd16(p)} for p in PPND16_POINTS]
    draws = []
    for i, (kind, args) in enumerate(DRAWS):
        seed = seed_for(f"draw-{i}")
        draws.append({"seed": seed.hex(), **run_draw(Draw(seed), kind, args)})
    seed = seed_for("sequence-0")
    draw = Draw(seed)
    sequence = {"seed": seed.hex(), "draws": [run_draw(draw, k, a) for k, a in SEQUENCE]}
    buckets = []
    for unit, shares, salt in BUCKETS:
        arm, u, prob, _, _ = bucket_assign(unit, shares, salt)
        buckets.append({
            "args": {"unit": unit, "shares": shares, "salt": salt},
            "uniforms": [u], "value": arm, "prob": prob, "is_density": False,
        })  # fmt: skip
    return {
        "spec": "drawledger draw specification v1 (docs/draw-spec.md)",
        "generated_by": "python tests/gen_draw_vectors.py",
        "floats": "JSON numbers in shortest round-trip form: parse each as an IEEE-754 double; "
        "an implementation must reproduce every one bit for bit",
        "word_to_uniform": words,
        "stream_blocks": stream,
        "ppnd16": ppnd,
        "draws": draws,
        "sequence": sequence,
        "bucket": buckets,
    }


def render() -> str:
    return json.dumps(vectors(), indent=1, ensure_ascii=False) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="compare instead of writing")
    args = parser.parse_args(argv)
    text = render()
    if args.check:
        same = DOC.exists() and DOC.read_text(encoding="utf-8") == text
        print("up to date" if same else f"{DOC} differs from the generator's output")
        return 0 if same else 1
    DOC.write_text(text, encoding="utf-8")
    print(f"wrote {DOC}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
