"""Outputs: results.json, candidates.csv, the terminal table and the HTML report, all rendered
from the same results dict so they cannot disagree."""
