/*
 * c_security_test: tests of the C interface's transport security and
 * tokens (sluice_session_set_tls, _set_token, _set_token_file,
 * _set_insecure) against three running servers made by scripts/test-cpp:
 *
 *   c_security_test DIR TOKEN_TARGET TLS_TARGET MTLS_TARGET STATE_TARGET
 *
 * DIR holds the files of client/cpp/tests/mkcerts (ca.pem, other-ca.pem,
 * client.pem, client-key.pem) and "token", the token file of the servers
 * that check tokens. TOKEN_TARGET serves plain text on loopback with
 * --token-file; TLS_TARGET serves TLS (server.pem) with --token-file;
 * MTLS_TARGET serves TLS with --client-ca ca.pem (client certificates
 * required), no tokens; STATE_TARGET serves plain text on loopback with
 * --token-file and --state-dir (checkpoints kept, so sessions can be
 * resumed).
 *
 * Each case prints "ok NAME" or "FAIL NAME: why"; the last line is
 * "c_security_test: N passed, M failed" and the exit code is 1 when M > 0.
 * A session that must pass also checks its posterior means against the
 * closed-form Gaussian means, tolerance 5 Monte Carlo standard errors
 * (MCSE = sd / sqrt(bulk-ESS), the server's final bulk-ESS; a two-sided
 * normal tail of about 6e-7), so that "passes" means draws were made and
 * delivered, not only that a call returned.
 *
 * It also follows a finished session (sluice_session_follow) with the
 * server's bearer token and the session's own token (sluice_session_token,
 * two different secrets): the follower must receive, bit for bit and in
 * order, the draws the session's own client received, from the start and
 * from the middle. A wrong bearer token is refused as UNAUTHENTICATED; a
 * wrong session token, the token of another session and an unknown session
 * id all get the same NOT_FOUND with field "session_id"; a missing session
 * token is refused before anything is sent.
 *
 * Last, it resumes a finished session on the server that keeps state
 * (sluice_session_resume from the middle: the same id and token again, and
 * bit for bit the second half of the draws and the same summary), and
 * checks that a wrong session token gets NOT_FOUND and a server without
 * state UNAVAILABLE.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "sluice.h"

static int passed, failed;
static const char *dir, *token_target, *tls_target, *mtls_target, *state_target;

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

static const char *file(const char *name) {
  static char buf[8][1024];
  static int next;
  char *b = buf[next++ % 8];
  snprintf(b, sizeof buf[0], "%s/%s", dir, name);
  return b;
}

/* N(mu, diag(1/prec)) in two dimensions: grad log pi = -prec (x - mu). */
static const double mu[2] = {1.0, -2.0}, prec[2] = {2.0, 0.5};

static int gaussian_eval(const sluice_batch *b, void *user) {
  int r, i;
  (void)user;
  for (r = 0; r < b->rows; r++) {
    double lp = 0;
    for (i = 0; i < 2; i++) {
      double d = b->points[r * 2 + i] - mu[i];
      if (b->want_gradient) b->gradients[r * 2 + i] = -prec[i] * d;
      lp -= 0.5 * prec[i] * d * d;
    }
    if (b->want_log_density) b->log_densities[r] = lp;
  }
  return 0;
}

static sluice_session *new_session(void) {
  static const double start[2] = {0, 0};
  sluice_spec spec;
  sluice_spec_defaults(&spec);
  spec.dim = 2;
  spec.chains = 4;
  spec.kernel = "mala";
  spec.start = start;
  spec.step = 0.3;
  spec.burn_in = 200;
  spec.draws_per_chain = 500;
  spec.seed = 31;
  return sluice_session_new(&spec, gaussian_eval, NULL);
}

/* expect_pass runs s on target and checks the session finished with every
 * draw and posterior means within 5 MCSE of mu. */
static void expect_pass(const char *name, sluice_session *s, const char *target) {
  char why[512] = "";
  int ok = 1, j;
  sluice_summary sum;
  int rc = sluice_session_run(s, target);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s (gRPC %d): %s", sluice_error_name(rc), sluice_session_grpc_code(s),
             sluice_session_error_message(s));
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_OK || sum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             sum.draws_received != 2000 || sum.dim != 2 || sum.progress.n_parameters != 2) {
    snprintf(why, sizeof why, "unexpected summary");
    ok = 0;
  } else {
    for (j = 0; j < 2 && ok; j++) {
      double mcse = sum.sd[j] / sqrt(sum.progress.bulk_ess[j]);
      double z = (sum.mean[j] - mu[j]) / mcse;
      if (!(sum.progress.bulk_ess[j] > 0) || !(fabs(z) <= 5)) {
        snprintf(why, sizeof why, "coordinate %d: mean %.6g, exact %.6g, MCSE %.3g (z = %.2f)", j, sum.mean[j], mu[j],
                 mcse, z);
        ok = 0;
      }
    }
  }
  report(name, ok, why);
  sluice_session_free(s);
}

/* expect_fail runs s on target and checks the code, the gRPC code (-1:
 * any) and that the message contains want (NULL: any non-empty message);
 * a refused session has no summary. */
static void expect_fail(const char *name, sluice_session *s, const char *target, int code, int grpc, const char *want) {
  char why[512] = "";
  int ok = 1;
  sluice_summary sum;
  int rc = sluice_session_run(s, target);
  const char *msg = sluice_session_error_message(s);
  if (rc != code || (grpc >= 0 && sluice_session_grpc_code(s) != grpc)) {
    snprintf(why, sizeof why, "got %s (gRPC %d): %s; want %s (gRPC %d)", sluice_error_name(rc),
             sluice_session_grpc_code(s), msg, sluice_error_name(code), grpc);
    ok = 0;
  } else if (want != NULL ? strstr(msg, want) == NULL : *msg == '\0') {
    snprintf(why, sizeof why, "message %s lacks \"%s\"", msg, want != NULL ? want : "(anything)");
    ok = 0;
  } else if (sluice_session_summary(s, &sum) != SLUICE_ERR_STATE) {
    snprintf(why, sizeof why, "a refused session has a summary");
    ok = 0;
  }
  if (ok) printf("   (%s: %s)\n", sluice_error_name(rc), msg);
  report(name, ok, why);
  sluice_session_free(s);
}

/* read_token returns the first line of DIR/token that is neither blank
 * nor a # comment. */
static const char *read_token(void) {
  static char tok[256];
  FILE *f = fopen(file("token"), "r");
  size_t n;
  if (f == NULL) {
    fprintf(stderr, "c_security_test: cannot read %s\n", file("token"));
    exit(2);
  }
  while (fgets(tok, sizeof tok, f) != NULL) {
    n = strlen(tok);
    while (n > 0 && (tok[n - 1] == '\n' || tok[n - 1] == '\r' || tok[n - 1] == ' ')) tok[--n] = '\0';
    if (n > 0 && tok[0] != '#') {
      fclose(f);
      return tok;
    }
  }
  fclose(f);
  fprintf(stderr, "c_security_test: no token in %s\n", file("token"));
  exit(2);
}

/* A record of the draws a callback received: rows, the first sequence
 * number, the next one expected, and running sums of every value, of value
 * x (seq + 1), and of the values from sequence number 1000 on. Sums taken
 * in the same order over the same values agree bit for bit, however the
 * rows were split into blocks. */
typedef struct {
  long rows;
  uint64_t first, next;
  double sum, weighted, tail;
  int gap;
} record;

static void record_draws(const sluice_draws *d, void *user) {
  record *r = (record *)user;
  int i, j;
  if (r->rows == 0) r->first = d->seq;
  else if (d->seq != r->next) r->gap = 1;
  for (i = 0; i < d->rows; i++)
    for (j = 0; j < d->dim; j++) {
      double v = d->values[i * d->dim + j];
      r->sum += v;
      r->weighted += v * (double)(d->seq + i + 1);
      if (d->seq + i >= 1000) r->tail += v;
    }
  r->rows += d->rows;
  r->next = d->seq + d->rows;
}

/* expect_not_found follows id with session token tok (and the server's
 * bearer token) and checks the answer is SLUICE_ERR_SERVER, gRPC 5
 * (NOT_FOUND), field "session_id", and no draws. */
static void expect_not_found(const char *name, const char *bearer, const char *id, const char *tok) {
  char why[512];
  record got;
  int rc;
  sluice_session *f = sluice_session_new(NULL, NULL, NULL);
  memset(&got, 0, sizeof got);
  sluice_session_set_token(f, bearer);
  sluice_session_on_draws(f, record_draws, &got);
  rc = sluice_session_follow(f, token_target, id, tok, 0);
  snprintf(why, sizeof why, "%s (gRPC %d, field \"%s\"): %s; %ld rows", sluice_error_name(rc),
           sluice_session_grpc_code(f), sluice_session_error_field(f), sluice_session_error_message(f), got.rows);
  if (rc == SLUICE_ERR_SERVER) printf("   (%s)\n", why);
  report(name,
         rc == SLUICE_ERR_SERVER && sluice_session_grpc_code(f) == 5 &&
             strcmp(sluice_session_error_field(f), "session_id") == 0 && got.rows == 0,
         why);
  sluice_session_free(f);
}

/* is_hex32 reports whether t is 32 lower-case hex digits, the form of a
 * session token (proto/sluice/v1/sluice.proto, Registered.resume_token). */
static int is_hex32(const char *t) {
  int i;
  for (i = 0; i < 32; i++)
    if (!((t[i] >= '0' && t[i] <= '9') || (t[i] >= 'a' && t[i] <= 'f'))) return 0;
  return t[32] == '\0';
}

/* Run a session with a token, keeping its draws, then follow it. */
static void test_follow(const char *token) {
  record own, all, half, before;
  char why[512] = "";
  char id[128], tok[128], other_tok[128], wrong_tok[128];
  int ok = 1, rc;
  size_t i;
  sluice_session *s = new_session(), *f;
  sluice_summary sum, fsum;
  memset(&own, 0, sizeof own);
  memset(&all, 0, sizeof all);
  memset(&half, 0, sizeof half);
  memset(&before, 0, sizeof before);
  sluice_session_set_token(s, token);
  sluice_session_on_draws(s, record_draws, &own);
  report("session_token_empty_before_run", strcmp(sluice_session_token(s), "") == 0, sluice_session_token(s));
  rc = sluice_session_run(s, token_target);
  snprintf(id, sizeof id, "%s", sluice_session_id(s));
  snprintf(tok, sizeof tok, "%s", sluice_session_token(s));
  if (rc != SLUICE_OK || own.rows != 2000 || own.gap || sluice_session_summary(s, &sum) != SLUICE_OK) {
    snprintf(why, sizeof why, "session: %s: %s, %ld rows", sluice_error_name(rc), sluice_session_error_message(s),
             own.rows);
    report("follow_replays_every_draw", 0, why);
    sluice_session_free(s);
    return;
  }
  snprintf(why, sizeof why, "session token \"%s\", bearer token \"%s\"", tok, token);
  report("session_token_is_32_hex_digits_not_the_bearer_token", is_hex32(tok) && strcmp(tok, token) != 0, why);

  /* From the start: the same draws, the same summary means. */
  f = sluice_session_new(NULL, NULL, NULL);
  sluice_session_set_token_file(f, file("token"));
  sluice_session_on_draws(f, record_draws, &all);
  rc = sluice_session_follow(f, token_target, id, tok, 0);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s (gRPC %d): %s", sluice_error_name(rc), sluice_session_grpc_code(f),
             sluice_session_error_message(f));
    ok = 0;
  } else if (all.rows != own.rows || all.first != 0 || all.gap || all.sum != own.sum || all.weighted != own.weighted ||
             sluice_session_next_seq(f) != 2000) {
    snprintf(why, sizeof why, "follower got %ld rows from %llu (sum %.17g, weighted %.17g), session %ld (%.17g, %.17g)",
             all.rows, (unsigned long long)all.first, all.sum, all.weighted, own.rows, own.sum, own.weighted);
    ok = 0;
  } else if (sluice_session_summary(f, &fsum) != SLUICE_OK || fsum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             fsum.draws_received != 2000 || fsum.dim != 2 || fsum.mean[0] != sum.mean[0] || fsum.mean[1] != sum.mean[1]) {
    snprintf(why, sizeof why, "follower's summary differs from the session's");
    ok = 0;
  }
  sluice_session_free(f);
  report("follow_replays_every_draw", ok, why);

  /* From the middle: exactly the second half. */
  f = sluice_session_new(NULL, NULL, NULL);
  sluice_session_set_token(f, token);
  sluice_session_on_draws(f, record_draws, &half);
  rc = sluice_session_follow(f, token_target, id, tok, 1000);
  ok = rc == SLUICE_OK && half.rows == 1000 && half.first == 1000 && !half.gap && half.sum == own.tail &&
       sluice_session_next_seq(f) == 2000;
  snprintf(why, sizeof why, "%s: %s; %ld rows from %llu, sum %.17g, session's %.17g", sluice_error_name(rc),
           sluice_session_error_message(f), half.rows, (unsigned long long)half.first, half.sum, own.tail);
  sluice_session_free(f);
  report("follow_from_the_middle", ok, why);

  /* The right session token with a wrong bearer token: the server refuses
   * the caller before looking at the session. */
  f = sluice_session_new(NULL, NULL, NULL);
  sluice_session_set_token(f, "not-the-token-of-this-server");
  sluice_session_on_draws(f, record_draws, &before);
  rc = sluice_session_follow(f, token_target, id, tok, 0);
  snprintf(why, sizeof why, "%s (gRPC %d): %s; %ld rows", sluice_error_name(rc), sluice_session_grpc_code(f),
           sluice_session_error_message(f), before.rows);
  report("follow_wrong_bearer_token_unauthenticated",
         rc == SLUICE_ERR_UNAUTHENTICATED && sluice_session_grpc_code(f) == 16 &&
             strstr(sluice_session_error_message(f), "invalid bearer token") != NULL && before.rows == 0,
         why);
  sluice_session_free(f);

  /* A wrong session token: the right one with its last digit changed
   * (still 32 hex digits). */
  snprintf(wrong_tok, sizeof wrong_tok, "%s", tok);
  i = strlen(wrong_tok);
  if (i > 0) wrong_tok[i - 1] = wrong_tok[i - 1] == '0' ? '1' : '0';
  expect_not_found("follow_wrong_session_token_not_found", token, id, wrong_tok);

  /* The bearer token in the session token's place. */
  expect_not_found("follow_bearer_token_as_session_token_not_found", token, id, token);

  /* The token of another session: tokens belong to their session. */
  f = new_session();
  sluice_session_set_token(f, token);
  rc = sluice_session_run(f, token_target);
  snprintf(other_tok, sizeof other_tok, "%s", sluice_session_token(f));
  snprintf(why, sizeof why, "second session: %s: %s; tokens \"%s\", \"%s\"", sluice_error_name(rc),
           sluice_session_error_message(f), other_tok, tok);
  sluice_session_free(f);
  if (rc != SLUICE_OK || !is_hex32(other_tok) || strcmp(other_tok, tok) == 0) {
    report("follow_other_sessions_token_not_found", 0, why);
  } else {
    expect_not_found("follow_other_sessions_token_not_found", token, id, other_tok);
  }

  /* An unknown id with a well-formed token. */
  expect_not_found("follow_unknown_session_not_found", token, "no-such-session", tok);

  /* No session token: refused before anything is sent. */
  f = sluice_session_new(NULL, NULL, NULL);
  sluice_session_set_token(f, token);
  rc = sluice_session_follow(f, token_target, id, "", 0);
  snprintf(why, sizeof why, "%s (gRPC %d): %s", sluice_error_name(rc), sluice_session_grpc_code(f),
           sluice_session_error_message(f));
  ok = rc == SLUICE_ERR_USAGE && sluice_session_grpc_code(f) == 0 &&
       strstr(sluice_session_error_message(f), "no session token") != NULL;
  sluice_session_free(f);
  f = sluice_session_new(NULL, NULL, NULL);
  sluice_session_set_token(f, token);
  rc = sluice_session_follow(f, token_target, id, NULL, 0);
  ok = ok && rc == SLUICE_ERR_USAGE && sluice_session_grpc_code(f) == 0;
  sluice_session_free(f);
  report("follow_without_session_token_refused", ok, why);
  sluice_session_free(s);
}

/* Run a session on the server that keeps state, then resume it. */
static void test_resume(const char *token) {
  record own, half, none;
  char why[512] = "";
  char id[128], tok[128], wrong_tok[128];
  int ok = 1, rc;
  size_t i;
  sluice_session *s = new_session(), *r;
  sluice_summary sum, rsum;
  memset(&own, 0, sizeof own);
  memset(&half, 0, sizeof half);
  memset(&none, 0, sizeof none);
  sluice_session_set_token(s, token);
  sluice_session_on_draws(s, record_draws, &own);
  rc = sluice_session_run(s, state_target);
  snprintf(id, sizeof id, "%s", sluice_session_id(s));
  snprintf(tok, sizeof tok, "%s", sluice_session_token(s));
  if (rc != SLUICE_OK || own.rows != 2000 || own.gap || sluice_session_summary(s, &sum) != SLUICE_OK ||
      sluice_session_next_seq(s) != 2000 || !is_hex32(tok)) {
    snprintf(why, sizeof why, "session: %s: %s, %ld rows, next_seq %llu, token \"%s\"", sluice_error_name(rc),
             sluice_session_error_message(s), own.rows, (unsigned long long)sluice_session_next_seq(s), tok);
    report("resume_finished_session_from_the_middle", 0, why);
    sluice_session_free(s);
    return;
  }

  /* From the middle: the same session, exactly the second half. */
  r = new_session();
  sluice_session_set_token(r, token);
  sluice_session_on_draws(r, record_draws, &half);
  rc = sluice_session_resume(r, state_target, id, tok, 1000);
  if (rc != SLUICE_OK) {
    snprintf(why, sizeof why, "%s (gRPC %d, field \"%s\"): %s", sluice_error_name(rc), sluice_session_grpc_code(r),
             sluice_session_error_field(r), sluice_session_error_message(r));
    ok = 0;
  } else if (strcmp(sluice_session_id(r), id) != 0 || strcmp(sluice_session_token(r), tok) != 0) {
    snprintf(why, sizeof why, "resumed as \"%s\" (token \"%s\"), want \"%s\" (\"%s\")", sluice_session_id(r),
             sluice_session_token(r), id, tok);
    ok = 0;
  } else if (half.rows != 1000 || half.first != 1000 || half.gap || half.sum != own.tail ||
             sluice_session_next_seq(r) != 2000) {
    snprintf(why, sizeof why, "%ld rows from %llu, sum %.17g, session's %.17g, next_seq %llu", half.rows,
             (unsigned long long)half.first, half.sum, own.tail, (unsigned long long)sluice_session_next_seq(r));
    ok = 0;
  } else if (sluice_session_summary(r, &rsum) != SLUICE_OK || rsum.reason != SLUICE_REASON_DRAWS_COLLECTED ||
             rsum.dim != 2 || rsum.mean[0] != sum.mean[0] || rsum.mean[1] != sum.mean[1]) {
    snprintf(why, sizeof why, "the resumed session's summary differs from the session's");
    ok = 0;
  }
  sluice_session_free(r);
  report("resume_finished_session_from_the_middle", ok, why);

  /* A wrong session token: NOT_FOUND, as for an unknown id. */
  snprintf(wrong_tok, sizeof wrong_tok, "%s", tok);
  i = strlen(wrong_tok);
  wrong_tok[i - 1] = wrong_tok[i - 1] == '0' ? '1' : '0';
  r = new_session();
  sluice_session_set_token(r, token);
  sluice_session_on_draws(r, record_draws, &none);
  rc = sluice_session_resume(r, state_target, id, wrong_tok, 0);
  snprintf(why, sizeof why, "%s (gRPC %d, field \"%s\"): %s; %ld rows", sluice_error_name(rc),
           sluice_session_grpc_code(r), sluice_session_error_field(r), sluice_session_error_message(r), none.rows);
  if (rc == SLUICE_ERR_SERVER) printf("   (%s)\n", why);
  report("resume_wrong_session_token_not_found",
         rc == SLUICE_ERR_SERVER && sluice_session_grpc_code(r) == 5 &&
             strcmp(sluice_session_error_field(r), "session_id") == 0 && none.rows == 0,
         why);
  sluice_session_free(r);

  /* A server that keeps no state cannot resume anything: UNAVAILABLE,
   * after the tries the resume policy allows (two short ones here). */
  r = new_session();
  sluice_session_set_token(r, token);
  sluice_session_set_resume(r, 2, 0.01, 0.02);
  rc = sluice_session_resume(r, token_target, id, tok, 0);
  snprintf(why, sizeof why, "%s (gRPC %d): %s", sluice_error_name(rc), sluice_session_grpc_code(r),
           sluice_session_error_message(r));
  if (rc == SLUICE_ERR_UNAVAILABLE) printf("   (%s)\n", why);
  report("resume_on_server_without_state_unavailable",
         rc == SLUICE_ERR_UNAVAILABLE && sluice_session_grpc_code(r) == 14, why);
  sluice_session_free(r);

  /* No session token: refused before anything is sent. */
  r = new_session();
  sluice_session_set_token(r, token);
  rc = sluice_session_resume(r, state_target, id, "", 0);
  snprintf(why, sizeof why, "%s (gRPC %d): %s", sluice_error_name(rc), sluice_session_grpc_code(r),
           sluice_session_error_message(r));
  report("resume_without_session_token_refused",
         rc == SLUICE_ERR_USAGE && strstr(sluice_session_error_message(r), "no session token") != NULL, why);
  sluice_session_free(r);
  sluice_session_free(s);
}

int main(int argc, char **argv) {
  sluice_session *s;
  const char *token;
  char any_addr[64];
  const char *colon;
  if (argc != 6) {
    fprintf(stderr, "usage: c_security_test DIR TOKEN_TARGET TLS_TARGET MTLS_TARGET STATE_TARGET\n");
    return 2;
  }
  dir = argv[1];
  token_target = argv[2];
  tls_target = argv[3];
  mtls_target = argv[4];
  state_target = argv[5];
  token = read_token();

  /* Tokens over plain text on loopback. */
  s = new_session();
  sluice_session_set_token(s, token);
  expect_pass("token_string_passes", s, token_target);

  s = new_session();
  sluice_session_set_token_file(s, file("token"));
  expect_pass("token_file_passes", s, token_target);

  s = new_session();
  sluice_session_set_token(s, "not-the-token-of-this-server");
  expect_fail("wrong_token_unauthenticated", s, token_target, SLUICE_ERR_UNAUTHENTICATED, 16, "invalid bearer token");

  s = new_session();
  expect_fail("no_token_unauthenticated", s, token_target, SLUICE_ERR_UNAUTHENTICATED, 16, "missing credentials");

  /* TLS with a token. */
  s = new_session();
  sluice_session_set_tls(s, file("ca.pem"), NULL, NULL);
  sluice_session_set_token_file(s, file("token"));
  expect_pass("tls_with_ca_and_token_passes", s, tls_target);

  s = new_session();
  sluice_session_set_tls(s, file("ca.pem"), NULL, NULL);
  expect_fail("tls_without_token_unauthenticated", s, tls_target, SLUICE_ERR_UNAUTHENTICATED, 16, "missing credentials");

  s = new_session();
  sluice_session_set_tls(s, file("other-ca.pem"), NULL, NULL);
  sluice_session_set_token(s, token);
  expect_fail("tls_untrusted_server_unavailable", s, tls_target, SLUICE_ERR_UNAVAILABLE, 14, NULL);

  s = new_session();
  sluice_session_set_token(s, token);
  expect_fail("plaintext_to_tls_server_unavailable", s, tls_target, SLUICE_ERR_UNAVAILABLE, 14, NULL);

  /* Mutual TLS. */
  s = new_session();
  sluice_session_set_tls(s, file("ca.pem"), NULL, NULL);
  expect_fail("mtls_without_client_certificate_unavailable", s, mtls_target, SLUICE_ERR_UNAVAILABLE, 14, NULL);

  s = new_session();
  sluice_session_set_tls(s, file("ca.pem"), file("client.pem"), file("client-key.pem"));
  expect_pass("mtls_with_client_certificate_passes", s, mtls_target);

  /* Plain text only to loopback unless insecure. 0.0.0.0 is not a
   * loopback address, but a connection to it reaches this machine, so the
   * insecure case stays on it. */
  colon = strrchr(token_target, ':');
  snprintf(any_addr, sizeof any_addr, "0.0.0.0%s", colon != NULL ? colon : ":0");
  s = new_session();
  sluice_session_set_token(s, token);
  expect_fail("plaintext_off_loopback_refused", s, any_addr, SLUICE_ERR_USAGE, 0, "not a loopback address");

  s = new_session();
  sluice_session_set_token(s, token);
  sluice_session_set_insecure(s, 1);
  expect_pass("plaintext_off_loopback_insecure_passes", s, any_addr);

  /* Misuse: reported before anything is sent. */
  s = new_session();
  report("certificate_without_key_refused",
         sluice_session_set_tls(s, file("ca.pem"), file("client.pem"), NULL) == SLUICE_ERR_USAGE &&
             strstr(sluice_session_error_message(s), "key") != NULL,
         sluice_session_error_message(s));
  sluice_session_free(s);
  report("null_handle_refused",
         sluice_session_set_tls(NULL, NULL, NULL, NULL) == SLUICE_ERR_USAGE &&
             sluice_session_set_token(NULL, token) == SLUICE_ERR_USAGE &&
             sluice_session_set_token_file(NULL, "x") == SLUICE_ERR_USAGE &&
             sluice_session_set_insecure(NULL, 1) == SLUICE_ERR_USAGE,
         "a NULL handle was accepted");

  s = new_session();
  sluice_session_set_tls(s, file("absent-ca.pem"), NULL, NULL);
  expect_fail("missing_ca_file_named", s, tls_target, SLUICE_ERR_USAGE, 0, "absent-ca.pem");

  s = new_session();
  sluice_session_set_token_file(s, file("absent-token"));
  expect_fail("missing_token_file_named", s, token_target, SLUICE_ERR_USAGE, 0, "absent-token");

  s = new_session();
  sluice_session_set_token(s, "   ");
  expect_fail("blank_token_refused", s, token_target, SLUICE_ERR_USAGE, 0, "blank");

  test_follow(token);
  test_resume(token);

  printf("c_security_test: %d passed, %d failed\n", passed, failed);
  return failed > 0 ? 1 : 0;
}
