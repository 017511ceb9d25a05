// Statistics of the live page, kept apart from the page's script so that a test can check them
// against reference values: window.surmiseStats.
'use strict';
window.surmiseStats = (() => {
  // ljungBox returns the Ljung–Box statistic of x over lags 1..h and its p-value, the chance that
  // χ²(h) exceeds it (Ljung and Box, Biometrika 65(2), 1978); for even h the survival function is
  // e^(−q/2)·Σ_{i<h/2} (q/2)^i/i! exactly, so h must be even. Null when x is too short or constant,
  // or h is odd.
  function ljungBox(x, h) {
    const n = x.length;
    if (n <= 3 * h || h % 2) return null;
    let mean = 0;
    for (const v of x) mean += v;
    mean /= n;
    let c0 = 0;
    for (const v of x) c0 += (v - mean) * (v - mean);
    if (!(c0 > 0)) return null;
    let q = 0;
    for (let lag = 1; lag <= h; lag++) {
      let s = 0;
      for (let t = 0; t + lag < n; t++) s += (x[t] - mean) * (x[t + lag] - mean);
      const r = s / c0;
      q += r * r / (n - lag);
    }
    q *= n * (n + 2);
    let term = 1, sum = 1;
    for (let i = 1; i < h / 2; i++) { term *= q / 2 / i; sum += term; }
    return { q, p: Math.exp(-q / 2) * sum };
  }

  return { ljungBox };
})();
