"""The derivation engine: operations as block equations, their loop invariants, and loop bodies derived
from what each block holds before and after the boundary moves."""
