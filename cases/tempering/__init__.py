"""Demo case: tempering of a quenched alloy steel part (see README.md)."""
