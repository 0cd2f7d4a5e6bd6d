"""drawledger.replay: verify, audit and estimate from a ledger (the analysis side)."""

__all__: list[str] = []
