"""Send shopper sessions to the example service on loopback, then check the ledger.

Each session asks for a recipe card (POST /home), schedules a basket reminder
(POST /reminder) and reports whether the shopper checked out (POST /outcome, once per
decision). The load is bounded in count (--sessions, at most 100000) and in time
(--max-seconds), and goes only to 127.0.0.1. Afterwards every decision id the service
returned must be in the ledger's ``decisions`` table, and every checkout in ``outcomes``.

    python load.py --port 8000 --sessions 500 --ledger grocery.db

Exit code 0 when every request has its record, 1 when some are missing.
"""

from __future__ import annotations

import argparse
import asyncio
import random
import sqlite3
import sys
import time

import httpx

HOST = "127.0.0.1"  # loopback only, on purpose
MAX_SESSIONS = 100_000
SEGMENTS = ["family", "single", "plant-based", "budget"]
# Invented checkout chances per featured card (the shoppers' taste, unknown to the service).
CHECKOUT = {
    "one-pot-pasta": 0.40,
    "green-curry": 0.36,
    "sheet-pan-salmon": 0.30,
    "taco-night": 0.42,
    "lentil-soup": 0.28,
    "overnight-oats": 0.26,
}


async def session(
    client: httpx.AsyncClient, i: int, rng: random.Random, ids: dict[str, list[str]]
) -> None:
    shopper = f"shopper-{i:06d}"
    home = await client.post("/home", json={"shopper": shopper, "segment": rng.choice(SEGMENTS)})
    home.raise_for_status()
    items = rng.randint(1, 12)
    basket = {"shopper": shopper, "items": items, "value": round(items * rng.uniform(3, 9), 2)}
    rem = await client.post("/reminder", json=basket)
    rem.raise_for_status()
    card, delay = home.json()["card"], rem.json()["delay_minutes"]
    # Reminders close to 40 minutes help a little more than late ones.
    checkout = rng.random() < CHECKOUT[card] + (0.05 if delay < 60 else 0.0)
    for body in (home.json(), rem.json()):
        out = await client.post(
            "/outcome", json={"decision_id": body["decision_id"], "checkout": checkout}
        )
        out.raise_for_status()
        ids["decisions"].append(body["decision_id"])


async def send(
    port: int, sessions: int, concurrency: int, max_seconds: float
) -> dict[str, list[str]]:
    rng = random.Random(20240611)
    ids: dict[str, list[str]] = {"decisions": []}
    deadline = time.monotonic() + max_seconds
    limits = httpx.Limits(max_connections=concurrency)
    async with httpx.AsyncClient(base_url=f"http://{HOST}:{port}", limits=limits, timeout=10) as c:
        queue = iter(range(sessions))

        async def worker() -> None:
            for i in queue:
                if time.monotonic() > deadline:
                    return
                await session(c, i, rng, ids)

        await asyncio.gather(*(worker() for _ in range(concurrency)))
    return ids


def missing_in_ledger(ledger: str, decision_ids: list[str], wait: float) -> tuple[int, int]:
    """(decisions missing, outcomes missing), polling until ``wait`` seconds have passed."""
    deadline = time.monotonic() + wait
    while True:
        con = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True)
        try:
            have = {r[0] for r in con.execute("SELECT decision_id FROM decisions")}
            scored = {r[0] for r in con.execute("SELECT decision_id FROM outcomes")}
        except sqlite3.OperationalError:  # the service has not created its tables yet
            have, scored = set(), set()
        finally:
            con.close()
        missing = (
            sum(d not in have for d in decision_ids),
            sum(d not in scored for d in decision_ids),
        )
        if missing == (0, 0) or time.monotonic() > deadline:
            return missing
        time.sleep(0.1)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, default=8000, help="service port on 127.0.0.1")
    parser.add_argument("--sessions", type=int, default=200, help="shopper sessions to send")
    parser.add_argument("--concurrency", type=int, default=8, help="requests in flight")
    parser.add_argument("--max-seconds", type=float, default=60.0, help="stop sending after this")
    parser.add_argument("--ledger", required=True, help="the service's SQLite ledger file")
    args = parser.parse_args()
    if not 1 <= args.sessions <= MAX_SESSIONS:
        parser.error(f"--sessions must be between 1 and {MAX_SESSIONS}")
    started = time.monotonic()
    ids = asyncio.run(send(args.port, args.sessions, args.concurrency, args.max_seconds))
    sent = time.monotonic() - started
    decisions = ids["decisions"]
    lost, unscored = missing_in_ledger(args.ledger, decisions, wait=10.0)
    print(
        f"sent {len(decisions) // 2} sessions ({len(decisions)} decisions) in {sent:.1f} s; "
        f"missing in the ledger: {lost} decisions, {unscored} outcomes"
    )
    return 0 if decisions and (lost, unscored) == (0, 0) else 1


if __name__ == "__main__":
    sys.exit(main())
