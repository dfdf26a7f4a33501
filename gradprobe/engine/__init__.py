"""Pure numerics of a check: no printing, no click, no rich."""
