"""Demo case: resistance spot welding of 1.0 mm steel sheet (see README.md)."""
