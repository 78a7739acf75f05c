"""Select layer: the slice language, compiled to SQL expressions with bound parameters."""
