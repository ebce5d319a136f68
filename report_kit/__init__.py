"""report-kit: randomized-experiment analysis from a project folder to an audited report.

The public API is the library modules (``spec``, ``data``, ``estimate``,
``randomization``, ``balance``, ``attrition``, ``multiplicity``, ``power``,
``provenance``...). Nothing is imported eagerly.
"""

__version__ = "0.1.0"
