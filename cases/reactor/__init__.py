"""Demo case: batch reactor, A -> B -> C (see README.md)."""
