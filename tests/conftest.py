"""Test-session setup shared by every test module."""
import os

# As the `hamstride` command does before numpy loads (cli.py): one BLAS thread, set before any test module imports
# numpy. The force-sharing solve's results move in the 6th digit with the BLAS thread count (1 vs 2 threads round
# the same sums differently), so in-process analyses used as references must run like the command's workers.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")
