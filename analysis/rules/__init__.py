"""The findings rules, one module per family; ``buswitness.analysis.findings`` runs them all."""
