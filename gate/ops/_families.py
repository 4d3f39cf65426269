"""Imports every op-family module so that its cost functions register themselves."""
