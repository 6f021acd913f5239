"""Ephemerides on a time grid and band physics (image quality, transmission, sky brightness)."""
