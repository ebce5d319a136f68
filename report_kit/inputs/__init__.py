"""Everything that reads the project folder: the design spec, the data tables, the project scaffold."""
