"""Demo case: laser cutting with nitrogen or oxygen assist gas (see README.md)."""
