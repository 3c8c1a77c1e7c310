"""Lowering: every late constraint becomes the merged arrays the solvers work on (Compiled)."""
