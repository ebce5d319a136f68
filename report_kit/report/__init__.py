"""What the notebooks show: the view of a run, figures, notebook execution and the renderers."""
