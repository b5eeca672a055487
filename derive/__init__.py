"""luforge: derive LU loop bodies from loop invariants and emit verified C and NumPy kernels.
The pipeline, one module a stage: spec -> options -> operation -> invariants -> derivation -> lower -> printers -> emit."""

__version__ = "0.1.0"
