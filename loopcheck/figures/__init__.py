"""Every figure and the HTML report (the only layer that imports matplotlib)."""
