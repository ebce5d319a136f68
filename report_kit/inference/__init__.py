"""The randomization engine: test statistics, null distributions, p-values, test inversion, multiplicity."""
