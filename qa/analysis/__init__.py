"""Numerical building blocks shared by metric families: plain arrays in, arrays out.

Nothing here knows about volumes, phantoms or files (slanted-edge analysis, noise power
spectra, observer models, forced-choice statistics).
"""
