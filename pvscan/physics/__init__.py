"""Physics the pipeline measures with: radiometry (Planck band radiance, sky, atmosphere)."""
