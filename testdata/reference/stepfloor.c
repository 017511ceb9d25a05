/*
 * stepfloor.c — what one filter tick costs in plain C, as the yardstick for
 * the Go benchmarks of estimator.Filter.Step (BenchmarkStep in
 * estimator/filter_bench_test.go).
 *
 * Build and run from the repository root (gcc -O2, nothing else: no -march,
 * no -ffast-math, so the compiler may not reorder the sums):
 *
 *     gcc -O2 -o /tmp/stepfloor testdata/reference/stepfloor.c -lm && /tmp/stepfloor
 *
 * An argument (prediction, current, kalman, kalman-dense-joseph) runs one
 * form only.
 *
 * Each line printed is "<form> n=.. m=.. p=..  <ns per tick>  <CPU ns per
 * tick>", each the best of five timed runs: wall time, and the CPU time of
 * the thread (less disturbed on a busy machine). The sizes and forms are the
 * Go benchmark's.
 *
 * The tick does the same arithmetic as Filter.Step with every output
 * present and the gate off, with straightforward hand-written
 * loops over row-major arrays of run-time size, one running sum per dot
 * product:
 *   prediction, current: x⁻ = A·x̂ + B·Δu(k−1) (+ L·r(k−1) in the prediction
 *     form); r = Δy − C·x⁻ − D·Δu; NIS by forward substitution with the
 *     stored Cholesky factor of S; x̂ = x⁻ + L·r (current) or keep L·r for
 *     the next tick (prediction).
 *   kalman: the above with P⁻ = A·P·Aᵀ + Q (A·P by rows, then the upper
 *     triangle of (A·P)·Aᵀ), C·P⁻, S = C·P⁻·Cᵀ + R, its Cholesky factor,
 *     Kᵀ = S⁻¹·C·P⁻ by forward and backward substitution, x̂ += K·r, and the
 *     Joseph form as M = P⁻ − K·(C·P⁻), H = K·R − M·Cᵀ, P = M + H·Kᵀ,
 *     symmetrised (O(n²p) for the update).
 *   kalman-dense-joseph: the same, but the Joseph form with full n×n
 *     products: G = I − K·C, P = G·P⁻·Gᵀ + K·R·Kᵀ (O(n³) for the update) —
 *     the textbook way, printed for comparison only.
 * The model is random but fixed (a linear congruential generator): A with
 * entries of size 0.5/√n keeps the Kalman covariance bounded.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

static uint64_t lcg = 88172645463325252ULL;
static double rnd(void) { /* uniform in (−1, 1) */
	lcg = lcg * 6364136223846793005ULL + 1442695040888963407ULL;
	return ((double)(lcg >> 11) / 9007199254740992.0) * 2 - 1;
}
static double *vec(int n) { return calloc((size_t)n, sizeof(double)); }
static double *rvec(int n, double s) {
	double *v = vec(n);
	for (int i = 0; i < n; i++) v[i] = s * rnd();
	return v;
}

enum { PREDICTION, CURRENT, KALMAN, KALMAN_DENSE };
static const char *names[] = {"prediction", "current", "kalman", "kalman-dense-joseph"};

typedef struct {
	int form, n, m, p;
	double *a, *b, *c, *d, *l, *chol, *invd, *q, *r, *y0, *u0;
	double *x, *xm, *pend, *uprev, *du, *yhat, *res, *z;
	double *P, *T, *cp, *S, *kt, *h, *kr, *G, *G2;
	int hasp, first;
} filt;

static filt *mk(int form, int n, int m, int p) {
	filt *f = calloc(1, sizeof *f);
	f->form = form, f->n = n, f->m = m, f->p = p;
	f->a = rvec(n * n, 0.5 / sqrt(n)), f->b = rvec(n * m, 1), f->c = rvec(p * n, 1), f->d = rvec(p * m, 0.1);
	f->l = rvec(n * p, 0.002);
	f->chol = vec(p * p), f->invd = vec(p);
	for (int i = 0; i < p; i++) f->chol[i * p + i] = 1, f->invd[i] = 1; /* S = I */
	f->q = vec(n * n), f->r = vec(p * p);
	for (int i = 0; i < n; i++) f->q[i * n + i] = 0.01;
	for (int i = 0; i < p; i++) f->r[i * p + i] = 0.1;
	f->y0 = vec(p), f->u0 = vec(m);
	f->x = vec(n), f->xm = vec(n), f->pend = vec(n), f->uprev = vec(m), f->du = vec(m);
	f->yhat = vec(p), f->res = vec(p), f->z = vec(p);
	f->P = vec(n * n), f->T = vec(n * n), f->cp = vec(p * n), f->S = vec(p * p);
	f->kt = vec(p * n), f->h = vec(n * p), f->kr = vec(p), f->G = vec(n * n), f->G2 = vec(n * n);
	for (int i = 0; i < n; i++) f->P[i * n + i] = 0.1;
	f->first = 1;
	return f;
}

static double dot(const double *a, const double *b, int n) {
	double s = 0;
	for (int i = 0; i < n; i++) s += a[i] * b[i];
	return s;
}
static void axpy(double *y, double alpha, const double *x, int n) {
	for (int i = 0; i < n; i++) y[i] += alpha * x[i];
}

static int cholesky(double *a, int k) {
	for (int j = 0; j < k; j++) {
		double s = a[j * k + j] - dot(a + j * k, a + j * k, j);
		if (!(s > 0)) return 0;
		double d = sqrt(s);
		a[j * k + j] = d;
		for (int i = j + 1; i < k; i++) a[i * k + j] = (a[i * k + j] - dot(a + i * k, a + j * k, j)) / d;
	}
	return 1;
}

static double forward_nis(double *z, const double *l, const double *invd, const double *r, int k) {
	double nis = 0;
	for (int i = 0; i < k; i++) {
		double v = r[i] - dot(l + i * k, z, i);
		v = invd ? v * invd[i] : v / l[i * k + i];
		z[i] = v;
		nis += v * v;
	}
	return nis;
}

static void predict_cov(filt *f) {
	int n = f->n;
	double *a = f->a, *P = f->P, *t = f->T;
	for (int i = 0; i < n; i++) {
		double *ti = t + i * n;
		memset(ti, 0, (size_t)n * sizeof(double));
		for (int l = 0; l < n; l++)
			if (a[i * n + l] != 0) axpy(ti, a[i * n + l], P + l * n, n);
	}
	for (int i = 0; i < n; i++)
		for (int j = i; j < n; j++) {
			double v = dot(t + i * n, a + j * n, n) + f->q[i * n + j];
			P[i * n + j] = v, P[j * n + i] = v;
		}
}

static void joseph_structured(filt *f) {
	int n = f->n, k = f->p;
	double *P = f->P, *M = f->T, *kt = f->kt, *h = f->h;
	memcpy(M, P, (size_t)n * n * sizeof(double));
	for (int a = 0; a < k; a++)
		for (int i = 0; i < n; i++)
			if (kt[a * n + i] != 0) axpy(M + i * n, -kt[a * n + i], f->cp + a * n, n);
	for (int i = 0; i < n; i++) {
		for (int b = 0; b < k; b++) f->kr[b] = 0;
		for (int a = 0; a < k; a++)
			for (int b = 0; b < k; b++) f->kr[b] += kt[a * n + i] * f->r[a * k + b];
		for (int b = 0; b < k; b++) h[i * k + b] = f->kr[b] - dot(M + i * n, f->c + b * n, n);
	}
	for (int i = 0; i < n; i++)
		for (int a = 0; a < k; a++)
			if (h[i * k + a] != 0) axpy(M + i * n, h[i * k + a], kt + a * n, n);
	for (int i = 0; i < n; i++) {
		P[i * n + i] = M[i * n + i];
		for (int j = i + 1; j < n; j++) {
			double v = 0.5 * (M[i * n + j] + M[j * n + i]);
			P[i * n + j] = v, P[j * n + i] = v;
		}
	}
}

static void joseph_dense(filt *f) {
	int n = f->n, k = f->p;
	double *P = f->P, *G = f->G, *T = f->T, *G2 = f->G2, *kt = f->kt;
	for (int i = 0; i < n; i++) /* G = I − K·C */
		for (int j = 0; j < n; j++) {
			double s = i == j;
			for (int a = 0; a < k; a++) s -= kt[a * n + i] * f->c[a * n + j];
			G[i * n + j] = s;
		}
	for (int i = 0; i < n; i++) /* T = G·P */
		for (int j = 0; j < n; j++) {
			double s = 0;
			for (int l = 0; l < n; l++) s += G[i * n + l] * P[l * n + j];
			T[i * n + j] = s;
		}
	for (int i = 0; i < n; i++) /* G2 = T·Gᵀ + K·R·Kᵀ */
		for (int j = 0; j < n; j++) {
			double s = dot(T + i * n, G + j * n, n);
			for (int a = 0; a < k; a++)
				for (int b = 0; b < k; b++) s += kt[a * n + i] * f->r[a * k + b] * kt[b * n + j];
			G2[i * n + j] = s;
		}
	for (int i = 0; i < n; i++)
		for (int j = i; j < n; j++) {
			double v = 0.5 * (G2[i * n + j] + G2[j * n + i]);
			P[i * n + j] = v, P[j * n + i] = v;
		}
}

static double step(filt *f, const double *u, const double *y) {
	int n = f->n, m = f->m, p = f->p;
	for (int j = 0; j < m; j++) f->du[j] = u[j] - f->u0[j];
	if (!f->first) {
		for (int i = 0; i < n; i++) f->xm[i] = dot(f->a + i * n, f->x, n) + dot(f->b + i * m, f->uprev, m);
		if (f->hasp)
			for (int i = 0; i < n; i++) f->xm[i] += f->pend[i];
		if (f->form >= KALMAN) predict_cov(f);
	} else {
		memcpy(f->xm, f->x, (size_t)n * sizeof(double));
	}
	f->first = 0, f->hasp = 0;
	memcpy(f->x, f->xm, (size_t)n * sizeof(double));
	for (int i = 0; i < p; i++) {
		f->yhat[i] = dot(f->c + i * n, f->xm, n) + dot(f->d + i * m, f->du, m);
		f->res[i] = y[i] - f->y0[i] - f->yhat[i];
	}
	double nis;
	if (f->form < KALMAN) {
		nis = forward_nis(f->z, f->chol, f->invd, f->res, p);
		if (f->form == CURRENT) {
			for (int i = 0; i < n; i++) f->x[i] += dot(f->l + i * p, f->res, p);
		} else {
			for (int i = 0; i < n; i++) f->pend[i] = dot(f->l + i * p, f->res, p);
			f->hasp = 1;
		}
	} else {
		for (int a = 0; a < p; a++) /* C·P⁻, row a = P·c_aᵀ */
			for (int j = 0; j < n; j++) f->cp[a * n + j] = dot(f->P + j * n, f->c + a * n, n);
		for (int a = 0; a < p; a++)
			for (int b = a; b < p; b++) {
				double v = dot(f->cp + a * n, f->c + b * n, n) + f->r[a * p + b];
				f->S[a * p + b] = v, f->S[b * p + a] = v;
			}
		if (!cholesky(f->S, p)) abort();
		nis = forward_nis(f->z, f->S, NULL, f->res, p);
		double *kt = f->kt, *ch = f->S;
		memcpy(kt, f->cp, (size_t)p * n * sizeof(double));
		for (int a = 0; a < p; a++) {
			for (int b = 0; b < a; b++) axpy(kt + a * n, -ch[a * p + b], kt + b * n, n);
			double s = 1 / ch[a * p + a];
			for (int j = 0; j < n; j++) kt[a * n + j] *= s;
		}
		for (int a = p - 1; a >= 0; a--) {
			for (int b = a + 1; b < p; b++) axpy(kt + a * n, -ch[b * p + a], kt + b * n, n);
			double s = 1 / ch[a * p + a];
			for (int j = 0; j < n; j++) kt[a * n + j] *= s;
		}
		for (int a = 0; a < p; a++) axpy(f->x, f->res[a], kt + a * n, n);
		if (f->form == KALMAN)
			joseph_structured(f);
		else
			joseph_dense(f);
	}
	for (int j = 0; j < m; j++) f->uprev[j] = f->du[j];
	return nis;
}

static double clock_ns(clockid_t id) {
	struct timespec ts;
	clock_gettime(id, &ts);
	return ts.tv_sec * 1e9 + ts.tv_nsec;
}
static double now(void) { return clock_ns(CLOCK_MONOTONIC); }
static double cpu(void) { return clock_ns(CLOCK_THREAD_CPUTIME_ID); }

int main(int argc, char **argv) {
	static const int sizes[][3] = {{4, 1, 2}, {20, 3, 5}, {100, 5, 10}, {20, 5, 3}};
	for (int s = 0; s < 4; s++) {
		int n = sizes[s][0], m = sizes[s][1], p = sizes[s][2];
		for (int form = PREDICTION; form <= KALMAN_DENSE; form++) {
			if (s == 3 && form < KALMAN) continue;
			if (argc > 1 && strcmp(argv[1], names[form]) != 0) continue; /* run one form only */
			filt *f = mk(form, n, m, p);
			enum { TICKS = 64 };
			double *us = rvec(TICKS * m, 4), *ys = rvec(TICKS * p, 1);
			/* calibrate to about 0.1 s of CPU per run */
			long iters = 100;
			for (;;) {
				double c0 = cpu();
				for (long i = 0; i < iters; i++) step(f, us + (i % TICKS) * m, ys + (i % TICKS) * p);
				if (cpu() - c0 > 1e7) break;
				iters *= 4;
			}
			iters *= 10;
			double best = 1e300, bestcpu = 1e300, sum = 0;
			for (int run = 0; run < 5; run++) {
				double t0 = now(), c0 = cpu();
				for (long i = 0; i < iters; i++) sum += step(f, us + (i % TICKS) * m, ys + (i % TICKS) * p);
				double ns = (now() - t0) / iters, cns = (cpu() - c0) / iters;
				if (ns < best) best = ns;
				if (cns < bestcpu) bestcpu = cns;
			}
			double check = sum;
			for (int i = 0; i < n; i++) check += f->x[i] + f->P[i * n + i];
			printf("%-20s n=%d m=%d p=%d  %10.1f ns/tick  %10.1f cpu-ns/tick  (checksum %.6g)\n", names[form], n, m, p, best,
			       bestcpu, check);
			fflush(stdout);
		}
	}
	return 0;
}
