"""Everything that touches files: the flight manifest, pipeline settings, packaged resources,
orthomosaics, layouts and the result writers."""
