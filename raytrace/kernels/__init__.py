"""numba kernels: small, pure, arrays in and arrays out."""
