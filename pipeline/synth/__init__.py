"""Synthetic primary-care extracts with known ground truth (the Orvane Bay scenario).

Nobody can share real records, so the demo, the tests and the benchmarks run on extracts made
here. Each comes with ``truth.parquet`` (every patient's true onset per condition) and
``scenario.json`` (every rate used), so case definitions can be scored against the truth.
"""

from pipeline.synth._generate import GenerationSummary, generate_extract
from pipeline.synth._scenario import Scenario, frank_kendall_tau

__all__ = ["GenerationSummary", "Scenario", "frank_kendall_tau", "generate_extract"]
