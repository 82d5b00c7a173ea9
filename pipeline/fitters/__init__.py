"""Fitters: passive properties per sweep and per cell; spiking properties from depolarizing steps."""
