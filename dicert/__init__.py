"""dicert: device-independent certified randomness from Bell-test trial logs.

The package is organised by pipeline stage:

``logs`` (read and validate trial logs) -> ``estimate`` (CHSH value and confidence bounds)
-> ``entropy`` (single-round bounds) -> ``finite`` (finite-size certification)
-> ``extract`` (Toeplitz hashing) -> ``audit`` (signed, hash-chained records).

Importing the package is cheap: heavy libraries (scipy, cvxpy, matplotlib,
cryptography) are imported inside the functions that need them.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
