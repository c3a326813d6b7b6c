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
# hand-worked metric/baseline values (pytest.approx keywords)
HAND = dict(rel=1e-12, abs=1e-12)
# metrics on float32 probabilities against scikit-learn (which computes in float32)
METRIC32 = dict(rtol=1e-5, atol=1e-7)
# linear AR coefficients (normal equations) against statsmodels' OLS (QR/pinv)
OLS = dict(rtol=1e-6, atol=1e-8)
# the fast custom-VJP BPTT against jax.grad of the plain scan, float64 (same sums, reordered)
FAST_VS_AUTODIFF = dict(rtol=1e-10, atol=1e-12)
# our scaler against scikit-learn's StandardScaler / MinMaxScaler (float64)
SCALER = dict(rtol=1e-10, atol=1e-12)
# training with bucketed (front-padded) windows and padded window counts against the unpadded
# run, float32 (same sums over more zero terms, a few epochs)
PADDED32 = dict(rtol=1e-4, atol=1e-5)
# a sweep's runs in worker processes / on Dask against the same runs in this process: same
# programs and seeds, only the XLA thread count differs (measured bitwise equal here)
SAME_RUN = dict(rtol=1e-9, atol=0.0)
# fit(df, load_config(exported)) against the metric recorded in the exported document (the
# sweep ran it padded to the sweep's shapes); the bound the exported document promises
REPRODUCE = dict(rel=1e-6, abs=0.0)
# the same run in another process whose XLA uses one thread instead of two:
# float32 dot products may be blocked differently, so results agree to rounding
OTHER_PROCESS = dict(rtol=1e-5, atol=1e-7)
