"""Measuring the flight: layout-to-ortho registration, zonal statistics, seam levelling and
per-module conditions."""
