"""Lowering: derivations become loop IR over index ranges; the IR, its dumps and its operation counts."""
