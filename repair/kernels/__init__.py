"""Compiled numerical kernels shared by the solvers: energies, batching, tournament trees."""
