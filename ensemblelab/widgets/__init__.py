"""Layer 4: Jupyter widgets (the only layer that imports ipywidgets, bqplot, nglview)."""

__all__: list[str] = []
