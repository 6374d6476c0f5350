/*
 * c_resume_test: the C interface resuming a session whose server was killed
 * and restarted mid-run, against a server that keeps checkpoints
 * (sluice serve --state-dir). scripts/test-cpp runs it and does the killing:
 *
 *   c_resume_test HOST:PORT SIGNAL_DIR
 *
 * Three sessions of the same spec and seed run in turn:
 *
 *   1. uninterrupted: the reference draws;
 *   2. resume on (the default): at the evaluator's 150th call the program
 *      creates SIGNAL_DIR/ready-1 and waits, inside the call, for
 *      SIGNAL_DIR/go-1, which the script creates once it has killed the
 *      server with SIGKILL and started it again on the same address and
 *      state. The run must end SLUICE_OK having resumed by itself
 *      (sluice_session_resumes >= 1). A follower on a thread of its own
 *      (sluice_session_follow from draw 0, started at the session's first
 *      draws, holding at least one block before the kill) must end
 *      SLUICE_OK having followed again by itself;
 *   3. resume off (sluice_session_set_resume(s, 0, 0, 0)), killed the same
 *      way (ready-2, go-2): the run must end SLUICE_ERR_UNAVAILABLE without
 *      resuming, and sluice_session_resume on a new handle from
 *      sluice_session_next_seq must finish it.
 *
 * In 2 (the session and its follower) and 3 the draws callback must see every sequence number of the
 * reference exactly once (no gap, no duplicate) with bit-identical values:
 * the noise is drawn on the server from the seed and the gradients are
 * exact, so a resumed session repeats the uninterrupted one (the wire
 * API's Resume contract). The last line is "c_resume_test: N passed,
 * M failed"; the exit code is 1 when M > 0.
 */
#define _POSIX_C_SOURCE 200809L
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "sluice.h"

enum { DIM = 2, CHAINS = 4, DRAWS_PER_CHAIN = 300, BURN_IN = 20, KILL_AT_CALL = 150 };
enum { TOTAL = CHAINS * DRAWS_PER_CHAIN };

static int passed, failed;
static const char *target, *signal_dir;

/* Shared with the follower thread (see follower below). */
static pthread_mutex_t follow_mu = PTHREAD_MUTEX_INITIALIZER;
static pthread_cond_t follow_cv = PTHREAD_COND_INITIALIZER;
static int follow_state; /* 0 waiting, 1 go, -1 abandoned; under follow_mu */
static char follow_id[256], follow_token[256];
static int followed_blocks; /* under follow_mu */

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

static void sleep_ms(long ms) {
  struct timespec t;
  t.tv_sec = ms / 1000;
  t.tv_nsec = (ms % 1000) * 1000000L;
  nanosleep(&t, NULL);
}

/* The target: N(mu, Q^-1) with Q = [[2, 0.5], [0.5, 1]]; the gradient of
 * log pi is -Q (x - mu). Each call sleeps 3 ms so that the server's
 * wall-time checkpoints (every 250 ms in scripts/test-cpp) can fall between
 * the start and the kill: the resumed session then replays steps whose
 * draws the client already has, which must not reach it twice. */
static const double mu[DIM] = {1, -1};
static const double q[DIM * DIM] = {2, 0.5, 0.5, 1};

typedef struct {
  int calls;
  int kill_round; /* > 0: at call KILL_AT_CALL, signal ready-N and wait for go-N */
  int wait_failed;
} evaluator;

static int file_exists(const char *path) { return access(path, F_OK) == 0; }

static int evaluate(const sluice_batch *b, void *user) {
  evaluator *e = (evaluator *)user;
  int r, i, j;
  e->calls++;
  for (r = 0; r < b->rows; r++) {
    const double *x = b->points + (size_t)r * DIM;
    for (i = 0; i < DIM; i++) {
      double g = 0;
      for (j = 0; j < DIM; j++) g -= q[i * DIM + j] * (x[j] - mu[j]);
      b->gradients[(size_t)r * DIM + i] = g;
    }
  }
  sleep_ms(3);
  if (e->kill_round > 0 && e->calls == KILL_AT_CALL) {
    char ready[4096], go[4096];
    FILE *f;
    int n;
    if (e->kill_round == 1) {
      /* The follower holds a block before the kill (bounded: 3 minutes). */
      int blocks = 0;
      for (n = 0; n < 18000; n++) {
        pthread_mutex_lock(&follow_mu);
        blocks = followed_blocks;
        pthread_mutex_unlock(&follow_mu);
        if (blocks > 0) break;
        sleep_ms(10);
      }
    }
    snprintf(ready, sizeof ready, "%s/ready-%d", signal_dir, e->kill_round);
    snprintf(go, sizeof go, "%s/go-%d", signal_dir, e->kill_round);
    f = fopen(ready, "w");
    if (f == NULL) {
      e->wait_failed = 1;
      return 0;
    }
    fclose(f);
    /* Bounded: 3 minutes in 10 ms naps. */
    for (n = 0; n < 18000 && !file_exists(go); n++) sleep_ms(10);
    if (!file_exists(go)) e->wait_failed = 1;
  }
  return 0;
}

/* What the draws callback saw, by sequence number. */
typedef struct {
  double values[TOTAL * DIM];
  int seen[TOTAL];
  int out_of_range, blocks;
} received;

static void on_draws(const sluice_draws *d, void *user) {
  received *got = (received *)user;
  int r;
  got->blocks++;
  for (r = 0; r < d->rows; r++) {
    uint64_t s = d->seq + (uint64_t)r;
    if (s >= TOTAL || d->dim != DIM) {
      got->out_of_range++;
      continue;
    }
    got->seen[s]++;
    memcpy(&got->values[s * DIM], d->values + (size_t)r * DIM, DIM * sizeof(double));
  }
}

/* The follower of session 2, on a thread of its own. The session's draws
 * callback (on the main thread) hands it the id and token at the first
 * draws; the evaluator waits for its first block before the kill. */
static received followed;
static int follow_rc = -1, follow_resumes;
static char follow_error[512];

static void on_followed(const sluice_draws *d, void *user) {
  on_draws(d, user);
  pthread_mutex_lock(&follow_mu);
  followed_blocks++;
  pthread_mutex_unlock(&follow_mu);
}

static void *follower(void *unused) {
  sluice_session *f;
  int state;
  (void)unused;
  pthread_mutex_lock(&follow_mu);
  while (follow_state == 0) pthread_cond_wait(&follow_cv, &follow_mu);
  state = follow_state;
  pthread_mutex_unlock(&follow_mu);
  if (state < 0) return NULL;
  f = sluice_session_new(NULL, NULL, NULL);
  if (f == NULL) return NULL;
  sluice_session_on_draws(f, on_followed, &followed);
  follow_rc = sluice_session_follow(f, target, follow_id, follow_token, 0);
  follow_resumes = sluice_session_resumes(f);
  snprintf(follow_error, sizeof follow_error, "%s", sluice_session_error_message(f));
  sluice_session_free(f);
  return NULL;
}

static void announce(int state) {
  pthread_mutex_lock(&follow_mu);
  if (follow_state == 0) {
    follow_state = state;
    pthread_cond_broadcast(&follow_cv);
  }
  pthread_mutex_unlock(&follow_mu);
}

/* Session 2's draws callback: on_draws, and at the first block the id and
 * token for the follower (read on the thread running the session). */
typedef struct {
  received *got;
  sluice_session *s;
} announced;

static void on_draws_announce(const sluice_draws *d, void *user) {
  announced *a = (announced *)user;
  int state;
  on_draws(d, a->got);
  pthread_mutex_lock(&follow_mu);
  state = follow_state;
  pthread_mutex_unlock(&follow_mu);
  if (state == 0) {
    snprintf(follow_id, sizeof follow_id, "%s", sluice_session_id(a->s));
    snprintf(follow_token, sizeof follow_token, "%s", sluice_session_token(a->s));
    announce(1);
  }
}

static sluice_session *new_session(evaluator *e, received *got) {
  static const double start[DIM] = {0, 0};
  sluice_spec spec;
  sluice_session *s;
  sluice_spec_defaults(&spec);
  spec.dim = DIM;
  spec.chains = CHAINS;
  spec.start = start;
  spec.start_rows = 1;
  spec.step = 0.2;
  spec.seed = 4242;
  spec.burn_in = BURN_IN;
  spec.draws_per_chain = DRAWS_PER_CHAIN;
  s = sluice_session_new(&spec, evaluate, e);
  if (s == NULL) {
    fprintf(stderr, "c_resume_test: out of memory\n");
    exit(2);
  }
  sluice_session_on_draws(s, on_draws, got);
  return s;
}

/* compare checks got against the reference: every draw once, bit for bit.
 * Returns 1 when it matches; otherwise writes why. */
static int compare(const received *got, const received *ref, char *why, size_t n) {
  int s, lost = 0, dup = 0, differ = -1;
  for (s = 0; s < TOTAL; s++) {
    if (got->seen[s] == 0) lost++;
    if (got->seen[s] > 1) dup += got->seen[s] - 1;
    if (got->seen[s] > 0 && differ < 0 &&
        memcmp(&got->values[s * DIM], &ref->values[s * DIM], DIM * sizeof(double)) != 0)
      differ = s;
  }
  if (lost == 0 && dup == 0 && differ < 0 && got->out_of_range == 0) return 1;
  snprintf(why, n, "%d lost, %d duplicated, %d out of range, first differing draw %d (of %d)", lost, dup,
           got->out_of_range, differ, TOTAL);
  return 0;
}

static received ref, auto_got, manual_got;

int main(int argc, char **argv) {
  char why[1024] = "";
  int rc, ok;
  evaluator e;
  sluice_session *s, *r;
  pthread_t follow_thread;
  if (argc != 3) {
    fprintf(stderr, "usage: c_resume_test HOST:PORT SIGNAL_DIR\n");
    return 2;
  }
  target = argv[1];
  signal_dir = argv[2];

  /* 1. The reference: never interrupted. */
  memset(&e, 0, sizeof e);
  s = new_session(&e, &ref);
  rc = sluice_session_run(s, target);
  snprintf(why, sizeof why, "%s: %s", sluice_error_name(rc), sluice_session_error_message(s));
  ok = rc == SLUICE_OK && sluice_session_resumes(s) == 0;
  if (ok) {
    int k;
    for (k = 0; k < TOTAL && ok; k++) ok = ref.seen[k] == 1;
    if (!ok) snprintf(why, sizeof why, "the uninterrupted run itself lost or repeated draws");
  }
  report("uninterrupted_reference", ok, why);
  sluice_session_free(s);
  if (!ok) {
    printf("c_resume_test: %d passed, %d failed\n", passed, failed + 2);
    return 1;
  }

  /* 2. Killed mid-run, resumed by itself; a follower too. */
  memset(&e, 0, sizeof e);
  e.kill_round = 1;
  s = new_session(&e, &auto_got);
  {
    static announced a;
    a.got = &auto_got;
    a.s = s;
    sluice_session_on_draws(s, on_draws_announce, &a);
  }
  if (pthread_create(&follow_thread, NULL, follower, NULL) != 0) {
    fprintf(stderr, "c_resume_test: cannot start the follower thread\n");
    return 2;
  }
  rc = sluice_session_run(s, target);
  announce(-1); /* no follower if the session never sent draws */
  pthread_join(follow_thread, NULL);
  snprintf(why, sizeof why, "%s: %s (resumes %d, evaluator calls %d)", sluice_error_name(rc),
           sluice_session_error_message(s), sluice_session_resumes(s), e.calls);
  /* The answer to call KILL_AT_CALL never reached the killed server, so the
   * restarted one asks again: more calls than an uninterrupted run. */
  ok = rc == SLUICE_OK && !e.wait_failed && sluice_session_resumes(s) >= 1 && e.calls > BURN_IN + DRAWS_PER_CHAIN;
  if (ok) ok = compare(&auto_got, &ref, why, sizeof why);
  if (ok) {
    sluice_summary sum;
    ok = sluice_session_summary(s, &sum) == SLUICE_OK && sum.reason == SLUICE_REASON_DRAWS_COLLECTED;
    if (!ok) snprintf(why, sizeof why, "no summary, or the session did not end with its draws collected");
  }
  if (ok)
    printf("   resumed %d time(s); %d evaluator calls (an uninterrupted run makes %d)\n", sluice_session_resumes(s),
           e.calls, BURN_IN + DRAWS_PER_CHAIN);
  report("server_killed_resumes_by_itself_no_gap_no_duplicate_identical", ok, why);
  sluice_session_free(s);

  snprintf(why, sizeof why, "%s: %s (resumes %d)", sluice_error_name(follow_rc), follow_error, follow_resumes);
  ok = follow_rc == SLUICE_OK && follow_resumes >= 1;
  if (ok) ok = compare(&followed, &ref, why, sizeof why);
  if (ok) printf("   the follower followed again %d time(s)\n", follow_resumes);
  report("follower_follows_again_by_itself_no_gap_no_duplicate_identical", ok, why);

  /* 3. Resume off: the run returns UNAVAILABLE; a resume by hand ends it. */
  memset(&e, 0, sizeof e);
  e.kill_round = 2;
  s = new_session(&e, &manual_got);
  sluice_session_set_resume(s, 0, 0, 0);
  rc = sluice_session_run(s, target);
  snprintf(why, sizeof why, "%s: %s (resumes %d)", sluice_error_name(rc), sluice_session_error_message(s),
           sluice_session_resumes(s));
  ok = rc == SLUICE_ERR_UNAVAILABLE && !e.wait_failed && sluice_session_resumes(s) == 0;
  report("resume_off_returns_unavailable", ok, why);
  if (ok) {
    r = new_session(&e, &manual_got);
    rc = sluice_session_resume(r, target, sluice_session_id(s), sluice_session_token(s), sluice_session_next_seq(s));
    snprintf(why, sizeof why, "%s: %s", sluice_error_name(rc), sluice_session_error_message(r));
    ok = rc == SLUICE_OK;
    if (ok) ok = compare(&manual_got, &ref, why, sizeof why);
    report("resume_by_hand_after_unavailable_no_gap_no_duplicate_identical", ok, why);
    sluice_session_free(r);
  } else {
    report("resume_by_hand_after_unavailable_no_gap_no_duplicate_identical", 0, "not run: the run above failed");
  }
  sluice_session_free(s);

  printf("c_resume_test: %d passed, %d failed\n", passed, failed);
  return failed > 0 ? 1 : 0;
}
