"""Pure measure functions: numpy arrays in SI units in, floats in SI units out (numpy/scipy only)."""
