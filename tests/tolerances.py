"""Every numerical tolerance used by the tests, in one place."""

# float64 comparisons of two exact computations of the same quantity
EXACT64 = dict(rtol=1e-6, atol=1e-9)
# float32 comparisons of two exact computations
EXACT32 = dict(rtol=2e-4, atol=2e-5)
# central finite differences (float64) against an exact gradient
FINITE_DIFF = dict(rtol=1e-4, atol=1e-7)
# against PyTorch in float64
TORCH64 = dict(rtol=1e-6, atol=1e-9)
# metrics against scikit-learn
METRIC = dict(rtol=1e-9, atol=1e-12)
