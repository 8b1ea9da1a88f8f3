"""Simplifier passes and derivatives over the IR."""
