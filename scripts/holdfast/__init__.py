"""holdfast: an honest model-selection run as a Snakemake workflow.

Seal a test set once, choose by cross-validation on the rest, refit the winner,
open the test set exactly once, and keep a tamper-evident ledger of every step.
"""

__version__ = "0.1.0"
