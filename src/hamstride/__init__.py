"""hamstride: late-swing hamstring stretch, lengthening velocity and lengthening work of sprinters from C3D files.

A screening and monitoring aid, not a diagnosis; decisions about an athlete's care belong to qualified clinicians and
local practice.
"""
__version__ = "0.1.0"
