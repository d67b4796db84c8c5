"""Small calibrated synthetic micrographs with their ground truth (see README.md in this folder).

Made by :mod:`tenfold.analysis.synthetic`; rebuild with ``python -m tenfold.analysis.synthetic --bundle sample_images``.
"""
