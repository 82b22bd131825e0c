"""Aquifer pumping-test demo: Theis cheap model, finite-difference solver, templates, data."""
