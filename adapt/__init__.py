"""adapt: an adaptive beamforming sandbox over simulated array sample streams.

scene -> streams -> processors -> scores -> runs/reports. See README.md.
"""
__version__ = "0.1.0"
