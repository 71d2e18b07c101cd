"""Diabatic model Hamiltonians (batched, atomic units)."""
