"""Power and minimum detectable effects, for a planned design and for the design as run."""
