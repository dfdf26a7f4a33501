"""The report model every renderer consumes: results, blame in stacks, and comparison with a stored report."""
