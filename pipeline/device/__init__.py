"""Device outlines: the outline model and its validation, parametric templates, GeoJSON/WKT/GDSII
readers and the device drawing. Imports nothing above :mod:`pipeline.errors`."""
