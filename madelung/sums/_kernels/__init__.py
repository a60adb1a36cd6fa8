"""Private Numba kernels (cache=True): arithmetic on contiguous arrays; they import nothing of the package outside this folder."""
