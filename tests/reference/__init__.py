"""Checks of compiled rules against published formulas and worked examples (IDs as in references.md)."""
