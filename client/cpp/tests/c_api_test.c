/*
 * c_api_test: tests of the C interface (sluice.h) against a running server.
 *
 *   c_api_test HOST:PORT
 *
 * Each case prints "ok NAME" or "FAIL NAME: why"; the last line is
 * "c_api_test: N passed, M failed" and the exit code is 1 when M > 0.
 * Statistical checks compare sampled means with closed-form Gaussian means,
 * tolerance 5 Monte Carlo standard errors (MCSE = sd / sqrt(bulk-ESS), the
 * server's final bulk-ESS; a two-sided normal tail of about 6e-7).
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "sluice.h"

static int passed, failed;
static const char *target;

static void report(const char *name, int ok, const char *why) {
  if (ok) {
    passed++;
    printf("ok %s\n", name);
  } else {
    failed++;
    printf("FAIL %s: %s\n", name, why);
  }
  fflush(stdout);
}

/* A Gaussian target N(mu, Q^-1) in dim d with a dense precision Q. */
typedef struct {
  int dim;
  const double *mu;
  const double *q; /* dim x dim, row-major */
  int calls, split_calls, full_rows;
  int nan_after;  /* > 0: return NaN in the gradient from that call on */
  int fail_after; /* > 0: return non-zero from that call on */
} gaussian;

static int gaussian_eval(const sluice_batch *b, void *user) {
  gaussian *g = (gaussian *)user;
  int r, i, j, d = b->dim;
  g->calls++;
  if (b->rows < g->full_rows) g->split_calls++;
  if (g->fail_after > 0 && g->calls >= g->fail_after) return 7;
  if (d != g->dim) return 1;
  for (r = 0; r < b->rows; r++) {
    const double *x = b->points + (size_t)r * d;
    double lp = 0;
    for (i = 0; i < d; i++) {
      double gi = 0;
      for (j = 0; j < d; j++) gi -= g->q[i * d + j] * (x[j] - g->mu[j]);
      if (b->want_gradient) b->gradients[(size_t)r * d + i] = gi;
      lp += 0.5 * gi * (x[i] - g->mu[i]);
      if (b->want_hessian)
        for (j = 0; j < d; j++) b->hessians[((size_t)r * d + i) * d + j] = -g->q[i * d + j];
      if (b->want_hessian_vector) {
        double hv = 0;
        for (j = 0; j < d; j++) hv -= g->q[i * d + j] * b->vectors[(size_t)r * d + j];
        b->hessian_vectors[(size_t)r * d + i] = hv;
      }
    }
    if (b->want_log_density) b->log_densities[r] = lp;
    if (g->nan_after > 0 && g->calls >= g->nan_after && b->want_gradient) b->gradients[(size_t)r * d] = NAN;
  }
  return 0;
}

/* check_means compares the summary's means with mu; writes why on failure. */
static int check_means(const sluice_summary *s, const double *mu, int dim, char *why, size_t n) {
  int j;
  if (s->dim != dim || s->progress.n_parameters != dim) {
    snprintf(why, n, "summary has %d parameters and %d diagnostics, want %d", s->dim, s->progress.n_parameters, dim);
    return 0;
  }
  for (j = 0; j < dim; j++) {
    double mcse = s->sd[j] / sqrt(s->progress.bulk_ess[j]);
    double z = (s->mean[j] - mu[j]) / mcse;
    if (!(s->progress.bulk_ess[j] > 0) || !(fabs(z) <= 5)) {
      snprintf(why, n, "coordinate %d: mean %.6g, exact %.6g, MCSE %.3g (z = %.2f)", j, s->mean[j], mu[j], mcse, z);
      return 0;
    }
  }
  return 1;
}

/* Hessian-vector products (ozaki-krylov) on a correlated 2-D Gaussian. */
static void test_hessian_vector(void) {
  static const double mu[2] = {1.0, -2.0}, q[4] = {2.0, 0.6, 0.6, 1.0}, start[2] = {0, 0};
  gaussian g = {2, mu, q, 0, 0, 0, 0, 0};
  sluice_spec spec;
  sluice_summary sum;
  char why[256] = "";
  int rc, ok;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 2;
  spec.chains = 8;
  spec.kernel = "ozaki-krylov";
  spec.start = start;
  spec.step = 0.5;
  spec.burn_in = 100;
  spec.draws_per_chain = 1000;
  spec.seed = 3;
  spec.names = "a,b";
  s = sluice_session_new(&spec, gaussian_eval, &g);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s: %s", sluice_error_name(rc), sluice_session_error_message(s));
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             sum.draws_received != 8000) {
    snprintf(why, sizeof why, "unexpected summary");
    ok = 0;
  } else {
    ok = check_means(&sum, mu, 2, why, sizeof why);
  }
  report("hessian_vector_products_ozaki_krylov", ok, why);
  sluice_session_free(s);
}

/* A request larger than the message limit arrives split over several
 * Points frames, each answered on its own; every draw still arrives. */
static int draws_blocks;
static void count_draws(const sluice_draws *d, void *user) {
  (void)user;
  (void)d;
  draws_blocks++;
}

static void test_split_frames(void) {
  enum { D = 40, C = 64 };
  static double mu[D], q[D * D], start[D];
  gaussian g;
  sluice_spec spec;
  sluice_summary sum;
  char why[256] = "";
  int rc, ok, i;
  sluice_session *s;
  for (i = 0; i < D; i++) {
    mu[i] = 0.1 * i;
    q[i * D + i] = 1.0 + 0.05 * i;
    start[i] = 0;
  }
  memset(&g, 0, sizeof g);
  g.dim = D;
  g.mu = mu;
  g.q = q;
  g.full_rows = C;
  sluice_spec_defaults(&spec);
  spec.dim = D;
  spec.chains = C;
  spec.start = start;
  spec.step = 0.2;
  spec.burn_in = 100;
  spec.draws_per_chain = 150;
  spec.seed = 5;
  /* 64 x 40 float64 values are 20480 bytes: a 16 KiB limit splits them. */
  spec.max_message_bytes = 16384;
  s = sluice_session_new(&spec, gaussian_eval, &g);
  sluice_session_on_draws(s, count_draws, NULL);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s: %s (field %s)", sluice_error_name(rc), sluice_session_error_message(s),
             sluice_session_error_field(s));
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             sum.draws_received != (long)C * 150) {
    snprintf(why, sizeof why, "unexpected summary: %lld draws", (long long)sum.draws_received);
    ok = 0;
  } else if (g.split_calls == 0) {
    snprintf(why, sizeof why, "no request was split (%d calls)", g.calls);
    ok = 0;
  } else {
    /* LMC keeps the mean of a Gaussian target exact (its bias is in the
     * covariance only), so the means are checked against mu. */
    ok = check_means(&sum, mu, D, why, sizeof why);
  }
  report("split_points_frames", ok, why);
  sluice_session_free(s);
}

/* A NaN in an answer ends the session with INVALID_ARGUMENT naming the
 * field; the summary sent before the status is kept. */
static void test_nan_gradient(void) {
  static const double mu[1] = {0}, q[1] = {1}, start[1] = {0.5};
  gaussian g = {1, mu, q, 0, 0, 0, 3, 0};
  sluice_spec spec;
  sluice_summary sum;
  char why[512] = "";
  int rc, ok = 0;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 1;
  spec.chains = 2;
  spec.start = start;
  spec.step = 0.1;
  spec.draws_per_chain = 100;
  s = sluice_session_new(&spec, gaussian_eval, &g);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_ERR_INVALID_ARGUMENT) {
    snprintf(why, sizeof why, "got %s, want SLUICE_ERR_INVALID_ARGUMENT", sluice_error_name(rc));
  } else if (sluice_session_grpc_code(s) != 3) {
    snprintf(why, sizeof why, "gRPC code %d, want 3 (INVALID_ARGUMENT)", sluice_session_grpc_code(s));
  } else if (strncmp(sluice_session_error_field(s), "evaluations.gradients", 21) != 0 ||
             strstr(sluice_session_error_description(s), "NaN") == NULL) {
    snprintf(why, sizeof why, "field \"%s\", description \"%s\", message \"%s\"", sluice_session_error_field(s),
             sluice_session_error_description(s), sluice_session_error_message(s));
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_FAILED) {
    snprintf(why, sizeof why, "no summary with reason failed");
  } else {
    ok = 1;
    printf("  field %s: %s\n", sluice_session_error_field(s), sluice_session_error_description(s));
  }
  report("nan_gradient_names_field", ok, why);
  sluice_session_free(s);
}

/* A spec the server refuses: the field is named. */
static void test_bad_spec(void) {
  static const double mu[2] = {0, 0}, q[4] = {1, 0, 0, 1}, start[2] = {0, 0};
  gaussian g = {2, mu, q, 0, 0, 0, 0, 0};
  sluice_spec spec;
  char why[512] = "";
  int rc, ok = 0;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 2;
  spec.chains = 2;
  spec.start = start;
  spec.step = -1; /* the step must be > 0 */
  spec.draws_per_chain = 10;
  s = sluice_session_new(&spec, gaussian_eval, &g);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_ERR_INVALID_ARGUMENT) {
    snprintf(why, sizeof why, "got %s (%s), want SLUICE_ERR_INVALID_ARGUMENT", sluice_error_name(rc),
             sluice_session_error_message(s));
  } else if (strstr(sluice_session_error_field(s), "step") == NULL) {
    snprintf(why, sizeof why, "field \"%s\" does not name the step (message \"%s\")", sluice_session_error_field(s),
             sluice_session_error_message(s));
  } else {
    ok = 1;
    printf("  field %s: %s\n", sluice_session_error_field(s), sluice_session_error_description(s));
  }
  report("bad_spec_names_field", ok, why);
  sluice_session_free(s);
}

/* A callback that fails stops the session; draws and summary still come. */
static void test_evaluator_failure(void) {
  static const double mu[1] = {0}, q[1] = {1}, start[1] = {0};
  gaussian g = {1, mu, q, 0, 0, 0, 0, 40};
  sluice_spec spec;
  sluice_summary sum;
  char why[512] = "";
  int rc, ok = 0;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 1;
  spec.chains = 2;
  spec.start = start;
  spec.step = 0.1;
  spec.draws_per_chain = 1000;
  s = sluice_session_new(&spec, gaussian_eval, &g);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_ERR_EVALUATOR) {
    snprintf(why, sizeof why, "got %s (%s), want SLUICE_ERR_EVALUATOR", sluice_error_name(rc),
             sluice_session_error_message(s));
  } else if (strstr(sluice_session_error_message(s), "returned 7") == NULL) {
    snprintf(why, sizeof why, "message \"%s\" does not carry the callback's code", sluice_session_error_message(s));
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_STOPPED ||
             sum.draws_received != sum.progress.draws_sent || sum.draws_received <= 0) {
    snprintf(why, sizeof why, "summary: reason %d, %lld draws received of %lld sent", sum.reason,
             (long long)sum.draws_received, (long long)sum.progress.draws_sent);
  } else {
    ok = 1;
  }
  report("evaluator_failure_stops", ok, why);
  sluice_session_free(s);
}

/* No server at the address. */
static void test_unavailable(void) {
  static const double start[1] = {0};
  sluice_spec spec;
  char why[512] = "";
  int rc;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 1;
  spec.chains = 1;
  spec.start = start;
  spec.step = 0.1;
  s = sluice_session_new(&spec, gaussian_eval, NULL);
  /* Port 1 on loopback: nothing of ours listens there. */
  rc = sluice_session_run(s, "127.0.0.1:1");
  if (rc != SLUICE_ERR_UNAVAILABLE)
    snprintf(why, sizeof why, "got %s (%s), want SLUICE_ERR_UNAVAILABLE", sluice_error_name(rc),
             sluice_session_error_message(s));
  report("no_server_unavailable", rc == SLUICE_ERR_UNAVAILABLE, why);
  sluice_session_free(s);
}

/* Stochastic gradients: a declared noise with 2 replicates per point
 * reaches the callback (batch->replicates == 2, rows x 2 x dim gradients);
 * each replicate is the exact gradient plus N(0, 0.5^2) noise. On a
 * Gaussian target, zero-mean gradient noise leaves the stationary mean of
 * SGLD exact (the recursion is linear), so the means are checked. */
typedef struct {
  unsigned long long state;
  int bad_replicates;
} noisy;

static double noisy_normal(noisy *n) {
  /* SplitMix64, then Box-Muller. */
  double u[2];
  int k;
  for (k = 0; k < 2; k++) {
    unsigned long long z = (n->state += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    z ^= z >> 31;
    u[k] = ((double)(z >> 11) + 0.5) / 9007199254740992.0;
  }
  return sqrt(-2 * log(u[0])) * cos(6.283185307179586 * u[1]);
}

static int noisy_eval(const sluice_batch *b, void *user) {
  noisy *n = (noisy *)user;
  static const double mu[2] = {0.5, -1.0}, q[2] = {1.0, 2.0}; /* diagonal precision */
  int r, j, i;
  if (b->replicates != 2 || b->dim != 2 || !b->want_gradient) {
    n->bad_replicates++;
    return 1;
  }
  for (r = 0; r < b->rows; r++)
    for (j = 0; j < b->replicates; j++)
      for (i = 0; i < 2; i++)
        b->gradients[((size_t)r * b->replicates + j) * 2 + i] =
            -q[i] * (b->points[(size_t)r * 2 + i] - mu[i]) + 0.5 * noisy_normal(n);
  return 0;
}

static void test_stochastic_replicates(void) {
  static const double mu[2] = {0.5, -1.0}, start[2] = {0, 0};
  noisy n = {12345, 0};
  sluice_spec spec;
  sluice_summary sum;
  char why[256] = "";
  int rc, ok;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 2;
  spec.chains = 8;
  spec.kernel = "sgld";
  spec.start = start;
  spec.step = 0.05;
  spec.burn_in = 200;
  spec.draws_per_chain = 1000;
  spec.seed = 9;
  spec.noise_declared = 1;
  spec.noise_replicates = 2;
  spec.noise_variance = 0.25;
  s = sluice_session_new(&spec, noisy_eval, &n);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s: %s (field %s)", sluice_error_name(rc), sluice_session_error_message(s),
             sluice_session_error_field(s));
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             sum.draws_received != 8000 || n.bad_replicates != 0) {
    snprintf(why, sizeof why, "unexpected summary or %d batches without 2 replicates", n.bad_replicates);
    ok = 0;
  } else {
    ok = check_means(&sum, mu, 2, why, sizeof why);
  }
  report("stochastic_gradient_replicates", ok, why);
  sluice_session_free(s);
}

/* The rejection kernel with a declared envelope: log densities only. The
 * target N(1, 0.5^2) has pi_tilde(x) = exp(-(x-1)^2 / 0.5); with the
 * envelope q = N(1, 1), pi_tilde / q = sqrt(2 pi) exp(-1.5 (x-1)^2) <=
 * sqrt(2 pi), so log_bound = log sqrt(2 pi) = 0.9189... holds; 1.0 is
 * declared. Its draws are exact and independent. */
static int narrow_eval(const sluice_batch *b, void *user) {
  int r;
  (void)user;
  if (!b->want_log_density || b->want_gradient || b->dim != 1) return 1;
  for (r = 0; r < b->rows; r++) {
    double d = b->points[r] - 1.0;
    b->log_densities[r] = -d * d / 0.5;
  }
  return 0;
}

static void test_rejection_envelope(void) {
  static const double mu[1] = {1.0}, start[1] = {0}, centre[1] = {1.0};
  sluice_spec spec;
  sluice_summary sum;
  char why[256] = "";
  int rc, ok;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 1;
  spec.chains = 4;
  spec.kernel = "rejection";
  spec.start = start;
  spec.draws_per_chain = 1000;
  spec.seed = 17;
  spec.envelope_declared = 1;
  spec.envelope_mean = centre;
  spec.envelope_scale = 1.0;
  spec.envelope_log_bound = 1.0;
  s = sluice_session_new(&spec, narrow_eval, NULL);
  rc = sluice_session_run(s, target);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s: %s (field %s)", sluice_error_name(rc), sluice_session_error_message(s),
             sluice_session_error_field(s));
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             sum.draws_received != 4000) {
    snprintf(why, sizeof why, "unexpected summary");
    ok = 0;
  } else {
    ok = check_means(&sum, mu, 1, why, sizeof why);
  }
  report("rejection_envelope_log_density", ok, why);
  sluice_session_free(s);
}

/* Misuse of the interface is reported, not crashed on. */
static void test_usage(void) {
  sluice_spec spec;
  sluice_summary sum;
  char why[256] = "";
  int ok = 1;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = 1;
  spec.chains = 1; /* start left NULL */
  s = sluice_session_new(&spec, gaussian_eval, NULL);
  if (sluice_session_run(s, target) != SLUICE_ERR_USAGE || strstr(sluice_session_error_message(s), "start") == NULL) {
    snprintf(why, sizeof why, "NULL start: %s", sluice_session_error_message(s));
    ok = 0;
  }
  if (ok && sluice_session_summary(s, &sum) != SLUICE_ERR_STATE) {
    snprintf(why, sizeof why, "summary without a session");
    ok = 0;
  }
  if (ok && (sluice_session_run(NULL, target) != SLUICE_ERR_USAGE || sluice_session_run(s, NULL) != SLUICE_ERR_USAGE)) {
    snprintf(why, sizeof why, "NULL handle or target accepted");
    ok = 0;
  }
  sluice_session_free(s);
  sluice_session_free(NULL);
  report("usage_errors", ok, why);
}

int main(int argc, char **argv) {
  if (argc != 2) {
    fprintf(stderr, "usage: c_api_test HOST:PORT\n");
    return 2;
  }
  target = argv[1];
  test_usage();
  test_unavailable();
  test_bad_spec();
  test_nan_gradient();
  test_evaluator_failure();
  test_hessian_vector();
  test_split_frames();
  test_stochastic_replicates();
  test_rejection_envelope();
  printf("c_api_test: %d passed, %d failed\n", passed, failed);
  return failed > 0 ? 1 : 0;
}
