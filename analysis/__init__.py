"""Analysis: the streaming mode counter, the mode map, calibration and chip length.

Pure numpy/scipy; imports no hardware, acquisition or simulator code.
"""
