"""Design-based estimators: Neyman differences, Lin adjustment, noncompliance, subgroups."""
