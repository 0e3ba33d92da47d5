"""adapt: an adaptive beamforming sandbox over simulated array sample streams.

scene -> streams -> processors -> scores -> runs/reports. See README.md.

The notebook API is :mod:`adapt.api` (``from adapt.api import load_scene, compare``):
the functions there do what the commands do, with the same words.
"""
__version__ = "0.1.0"
