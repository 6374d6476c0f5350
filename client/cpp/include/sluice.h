/*
 * sluice.h: the C interface of the sluice client, for C, Fortran
 * (iso_c_binding) and Julia (ccall) codes.
 *
 * A session: fill a sluice_spec (start from sluice_spec_defaults), create a
 * handle with sluice_session_new and the evaluation callback, optionally add
 * draws and progress callbacks, call sluice_session_run with the server's
 * address, read the summary and free the handle.
 *
 *   sluice_spec spec;
 *   sluice_spec_defaults(&spec);
 *   spec.dim = 2; spec.chains = 8; spec.step = 0.1; spec.draws_per_chain = 1000;
 *   spec.start = start; spec.start_rows = 1;
 *   sluice_session *s = sluice_session_new(&spec, evaluate, &my_model);
 *   sluice_session_set_tls(s, "ca.pem", NULL, NULL);      (servers with TLS)
 *   sluice_session_set_token_file(s, "token.txt");       (servers with a bearer token)
 *   int rc = sluice_session_run(s, "sluice:7070");
 *   if (rc != SLUICE_OK)
 *     fprintf(stderr, "%s: %s (field %s)\n", sluice_error_name(rc),
 *             sluice_session_error_message(s), sluice_session_error_field(s));
 *   sluice_session_free(s);
 *
 * Every array is float64, row-major: element (r, c) of an R x C array is at
 * index r*C + c. A Fortran array x(dim, rows) has the same layout (column
 * x(:, r) is row r). Everything the callback returns is of log pi (the log
 * density up to a constant, its gradient, its Hessian), never of -log pi.
 *
 * No C++ type crosses this interface; the handle is opaque. Strings
 * returned by the library stay valid until the handle is freed (or, for
 * the error getters, until the next sluice_session_run). A handle is used
 * by one thread at a time; distinct handles are independent.
 */
#ifndef SLUICE_H
#define SLUICE_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* The opaque session handle. */
typedef struct sluice_session sluice_session;

/* Result codes of sluice_session_run (and of the other calls that can
 * fail). Codes from SLUICE_ERR_INVALID_ARGUMENT to SLUICE_ERR_SERVER come
 * from the server's gRPC status; sluice_session_grpc_code gives the status
 * code itself. */
enum sluice_code {
  SLUICE_OK = 0,
  /* The server refused the session's input: a field of the spec, or an
   * answer of the callback (a NaN, a wrong shape). The field getter names
   * it, e.g. "evaluations.gradients". gRPC INVALID_ARGUMENT. */
  SLUICE_ERR_INVALID_ARGUMENT = 1,
  /* A message exceeded the negotiated size. gRPC RESOURCE_EXHAUSTED. */
  SLUICE_ERR_RESOURCE_EXHAUSTED = 2,
  /* The client took too long to answer, or a deadline passed.
   * gRPC DEADLINE_EXCEEDED. */
  SLUICE_ERR_DEADLINE_EXCEEDED = 3,
  /* No server at the address, or the connection broke and resuming
   * (sluice_session_set_resume) did not get the session back.
   * gRPC UNAVAILABLE. */
  SLUICE_ERR_UNAVAILABLE = 4,
  /* The call was cancelled. gRPC CANCELLED. */
  SLUICE_ERR_CANCELLED = 5,
  /* Any other error status from the server (sluice_session_grpc_code
   * tells which). */
  SLUICE_ERR_SERVER = 6,
  /* The evaluation callback returned non-zero: the client sent Stop, and
   * the draws already made and the summary were still received. */
  SLUICE_ERR_EVALUATOR = 7,
  /* The server's frames broke the protocol (a malformed frame, draws lost
   * or repeated, or the stream ended without a Finished frame). */
  SLUICE_ERR_PROTOCOL = 8,
  /* A bad argument to this interface (a NULL handle, a NULL target, a
   * spec whose arrays are missing). Nothing was sent. */
  SLUICE_ERR_USAGE = 9,
  /* The session was already run: a handle runs once. */
  SLUICE_ERR_STATE = 10,
  /* The server wants a bearer token and got none, or not one it accepts
   * (sluice_session_set_token). gRPC UNAUTHENTICATED. */
  SLUICE_ERR_UNAUTHENTICATED = 11
};

/* Why a session ended (Finished.reason). */
enum sluice_reason {
  SLUICE_REASON_NONE = 0, /* no Finished frame received */
  SLUICE_REASON_BUDGET_SPENT = 1,
  SLUICE_REASON_TIME_SPENT = 2,
  SLUICE_REASON_STOPPED = 3,
  SLUICE_REASON_DRAWS_COLLECTED = 4,
  SLUICE_REASON_FAILED = 5,
  SLUICE_REASON_SHUTDOWN = 6,
  SLUICE_REASON_TARGET_MET = 7
};

/* Distance of a guaranteed bound. */
enum sluice_metric { SLUICE_METRIC_DEFAULT = 0, SLUICE_METRIC_TV = 1, SLUICE_METRIC_W2 = 2 };

/* sluice_spec describes a session; each field means what the Register
 * message of proto/sluice/v1/sluice.proto says, and 0 (or NULL) takes the
 * server's default. Arrays and strings are copied by sluice_session_new. */
typedef struct sluice_spec {
  int32_t dim;    /* >= 1 */
  int32_t chains; /* >= 1 */
  /* start_rows x dim values, row-major; start_rows is 1 (every chain
   * starts there) or chains. Required. */
  const double *start;
  int32_t start_rows;
  int32_t curvature_declared; /* non-zero: the four curvature fields count */
  /* Sampling method, NUL-terminated: "lmc" (NULL or ""), "kinetic",
   * "baoab", "midpoint", "midpoint-overdamped", "mala", "ozaki", "ozaki-krylov",
   * "sgld", "hit-and-run", ... (see the README's kernel table). */
  const char *kernel;
  /* Parameter names, NUL-terminated, separated by commas (so a name
   * cannot contain one); NULL: theta[0], theta[1], ... */
  const char *names;
  double step;
  int64_t burn_in;
  int64_t keep_every;
  int64_t draws_per_chain;
  int64_t max_evaluations;
  double max_seconds;
  int64_t progress_every_steps;
  double progress_interval_seconds;
  uint64_t seed;
  /* Largest message in bytes either way; 0 means 4 MiB. The client sets
   * its channel's send and receive limits to it and tells the server,
   * which splits requests to fit. */
  int64_t max_message_bytes;
  /* Curvature of -log pi: m I <= Hessian <= M I (see curvature_declared). */
  double strong_convexity;
  double smoothness;
  double start_distance;
  double second_moment;
  /* Accuracy targets; 0 is not a target. want_metric is a sluice_metric. */
  double want_min_bulk_ess;
  double want_min_tail_ess;
  double want_max_rhat;
  double want_max_ksd;
  double want_eps;
  int32_t want_metric;
  int32_t krylov_max_iterations;
  double friction;
  double inverse_mass;
  double krylov_tolerance;
  double slice_width;
  int32_t slice_max_expansions;
  int32_t curvature_probe_iterations;
  /* Stochastic gradients (noise_declared non-zero): declared variance of
   * one replicate's error per coordinate and bias (0: not declared), data
   * and minibatch sizes (for epochs), and gradient replicates per point
   * (0: 1; with 2 or more the server measures the noise). */
  int32_t noise_declared;
  int32_t noise_replicates;
  double noise_variance;
  double noise_bias;
  int64_t noise_data_size;
  int64_t noise_minibatch_size;
  /* "sgld" decreasing step (schedule_declared non-zero; step must be 0):
   * epsilon_t = a (b + t)^(-gamma), step epsilon_t / 2. */
  int32_t schedule_declared;
  int32_t anchor_every; /* "svrg" */
  double schedule_a;
  double schedule_b;
  double schedule_gamma;
  double fixed_point_tolerance; /* "sgld-cv" */
  int32_t fixed_point_iterations; /* "sgld-cv" */
  /* "rejection" (envelope_declared non-zero): the Gaussian envelope
   * N(envelope_mean, envelope_scale^2 I), dim values, with the declared
   * bound pi_tilde <= exp(envelope_log_bound) q. */
  int32_t envelope_declared;
  const double *envelope_mean;
  double envelope_scale;
  double envelope_log_bound;
} sluice_spec;

/* sluice_batch is one set of points to evaluate, given to the callback.
 * The want_* flags say what to fill; the output arrays of what is not
 * wanted are NULL. All arrays belong to the library and are valid during
 * the call only. */
typedef struct sluice_batch {
  int32_t rows;
  int32_t dim;
  int32_t want_gradient;
  int32_t want_log_density;
  int32_t want_hessian;
  int32_t want_hessian_vector;
  /* Gradient estimates per row (1 for exact gradients). */
  int32_t replicates;
  /* Non-zero: evaluate with the whole data set (stochastic gradients). */
  int32_t full_data;
  const double *points;    /* rows x dim */
  const int32_t *chains;   /* rows: the chain of each row */
  const int32_t *groups;   /* rows minibatch groups, or NULL */
  const double *vectors;   /* rows x dim when want_hessian_vector */
  double *gradients;       /* out: rows x replicates x dim, grad log pi */
  double *log_densities;   /* out: rows, log pi up to a constant */
  double *hessians;        /* out: rows x dim x dim, Hessian of log pi */
  double *hessian_vectors; /* out: rows x dim, Hessian times vectors */
} sluice_batch;

/* The evaluation callback: fill the wanted outputs of *batch and return 0,
 * or return non-zero to stop the session (sluice_session_run then returns
 * SLUICE_ERR_EVALUATOR after receiving the last draws and the summary). */
typedef int (*sluice_evaluate_fn)(const sluice_batch *batch, void *user_data);

/* sluice_draws is a block of kept draws numbered seq, seq+1, ...,
 * seq+rows-1 across the session (the library checks there is no gap). */
typedef struct sluice_draws {
  uint64_t seq;
  int32_t rows;
  int32_t dim;
  const double *values;      /* rows x dim */
  const int32_t *chains;     /* rows */
  const int64_t *iterations; /* rows: the chain's step count */
} sluice_draws;

typedef void (*sluice_draws_fn)(const sluice_draws *draws, void *user_data);

/* sluice_progress is a progress report. Per-parameter arrays have
 * n_parameters entries (0 until enough draws); -1 means "not available"
 * or "no limit" where the wire API says so. */
typedef struct sluice_progress {
  int32_t state; /* 1 burn-in, 2 sampling, 3 finished */
  int32_t n_parameters;
  int64_t steps;
  int64_t evaluations_used;
  int64_t evaluations_left;
  int64_t draws_sent;
  double seconds_used;
  double seconds_left;
  double evaluations_per_second;
  double ksd;
  /* The bound, when one applies (has_bound non-zero). */
  int32_t has_bound;
  int32_t bound_guaranteed; /* declared curvature: guaranteed; else estimated */
  double bound_value;
  const double *mean;
  const double *sd;
  const double *rhat;
  const double *bulk_ess;
  const double *tail_ess;
  const double *mcse_mean;
} sluice_progress;

typedef void (*sluice_progress_fn)(const sluice_progress *progress, void *user_data);

/* sluice_summary is what a finished session reports: the server's
 * per-parameter mean, sd and count over all kept draws, and the final
 * progress (with its measured accuracy). Arrays have dim entries and
 * belong to the handle. */
typedef struct sluice_summary {
  int32_t reason; /* sluice_reason */
  int32_t dim;
  int64_t draws_received;
  uint64_t seed;
  double step;
  const double *mean;
  const double *sd;
  const int64_t *count;
  sluice_progress progress;
} sluice_summary;

/* Fills *spec with zeros (the server's defaults), start_rows = 1. */
void sluice_spec_defaults(sluice_spec *spec);

/* Creates a session handle; copies the spec. Returns NULL only when out of
 * memory. Input errors are reported by sluice_session_run. */
sluice_session *sluice_session_new(const sluice_spec *spec, sluice_evaluate_fn evaluate, void *user_data);

/* Calls fn for every block of draws, in sequence order, on the thread
 * running sluice_session_run. */
void sluice_session_on_draws(sluice_session *s, sluice_draws_fn fn, void *user_data);

/* Calls fn for every progress report. */
void sluice_session_on_progress(sluice_session *s, sluice_progress_fn fn, void *user_data);

/* Transport security and authentication, set before sluice_session_run.
 * Each returns SLUICE_OK, or SLUICE_ERR_USAGE (a NULL handle, a certificate
 * without its key); files are read by sluice_session_run, which returns
 * SLUICE_ERR_USAGE with a message naming an unreadable one.
 *
 * sluice_session_set_tls: connect with TLS. ca_file holds the PEM
 * authorities trusted to sign the server's certificate (NULL or "": the
 * system's roots); cert_file and key_file, both or neither, the client's
 * certificate and key for a server requiring them (mutual TLS). */
int sluice_session_set_tls(sluice_session *s, const char *ca_file, const char *cert_file, const char *key_file);

/* Sends "authorization: Bearer <token>" with every call (what a server
 * started with --token-file wants). NULL or "" removes it. This bearer
 * token admits a client to the server; it is not a session's own token
 * (sluice_session_token), which sluice_session_follow takes. */
int sluice_session_set_token(sluice_session *s, const char *token);

/* The same with the token read from a file: its first line that is
 * neither blank nor a # comment, white space trimmed. NULL or "" removes
 * it. */
int sluice_session_set_token_file(sluice_session *s, const char *path);

/* Non-zero allows a plain-text connection to a host that is not loopback
 * (a trusted network). Without TLS and without it, sluice_session_run
 * refuses any target but 127.0.0.0/8, ::1, localhost and Unix sockets
 * with SLUICE_ERR_USAGE, before sending anything. */
int sluice_session_set_insecure(sluice_session *s, int insecure);

/* How sluice_session_run, _resume and _follow resume by themselves when
 * their stream breaks (gRPC UNAVAILABLE: the server was killed, restarts,
 * or shut down having checkpointed the session; a reset connection): they
 * open a new stream that sends Resume with the session id, its token and
 * the next draw needed (a follow follows again from there), so the draws
 * callback sees every draw once, in order, with no gap, and the evaluation
 * callback may be asked again for points it evaluated before. On by
 * default: 10 tries in a row, waiting 0.1 s, 0.2 s, 0.4 s, ... and at most
 * 5 s between two; a try that gets the session back resets the count.
 * attempts <= 0 turns it off (the error is returned at once; resume by
 * hand with sluice_session_resume); a wait of 0 takes its default.
 * A session the server never registered is not resumed. The server must
 * keep state (sluice serve --state-dir or --state-postgres) for a session
 * to outlive it. Returns SLUICE_OK, or SLUICE_ERR_USAGE for a NULL handle
 * or a wait outside [0, 3600] seconds. */
int sluice_session_set_resume(sluice_session *s, int attempts, double first_wait_seconds, double max_wait_seconds);

/* Connects to target ("host:port"), with TLS and a token when set above
 * (plain text otherwise, to loopback only), runs the session until the
 * server finishes it, and returns SLUICE_OK or an error code. The summary
 * is available after SLUICE_OK, and after an error when the server sent
 * one (a Finished frame with reason FAILED, or after a callback error). */
int sluice_session_run(sluice_session *s, const char *target);

/* Follows another client's session: streams the draws of session_id
 * (sluice_session_id of that session) from sequence number from_seq on to
 * the draws callback of s, in order and exactly once, until the session's
 * final frame, with s's TLS and bearer-token settings. session_token is
 * the followed session's own secret (sluice_session_token of that
 * session), required; it is not the server's bearer token
 * (sluice_session_set_token), which a server started with --token-file
 * wants as well. Make s with sluice_session_new(NULL, NULL, NULL): its
 * spec and evaluation callback are not used. Returns SLUICE_OK (the
 * summary then holds the session's figures, draws_received this
 * follower's rows) or an error code: SLUICE_ERR_USAGE, nothing sent, for
 * a NULL or empty target, session_id or session_token; SLUICE_ERR_SERVER
 * with gRPC code 5 (NOT_FOUND) and field "session_id" for an unknown
 * session or a wrong session token (the same answer, so that a caller
 * without the token learns nothing about which sessions exist), 11
 * (OUT_OF_RANGE) when the rows asked for have left the server's buffer.
 * After an error, sluice_session_next_seq says where a new handle resumes
 * without loss or duplicate. A handle follows (or runs) once. The
 * handle's message limit is 64 MiB, as large as a Follow frame can be. */
int sluice_session_follow(sluice_session *s, const char *target, const char *session_id, const char *session_token,
                          uint64_t from_seq);

/* Continues session session_id after its stream broke or its server
 * restarted, on a server that keeps checkpoints (sluice serve --state-dir
 * or --state-postgres): a Resume frame in place of Register. s is a new
 * handle made like the one that ran the session, with the same evaluation
 * callback (the server may ask again for points it asked before) and the
 * same max_message_bytes (the rest of its spec is not sent), its draws and
 * progress callbacks, TLS and bearer token. session_id and session_token
 * are sluice_session_id and sluice_session_token of the handle that ran
 * (the session token, not the server's bearer token); next_seq the first
 * draw not yet received, sluice_session_next_seq of that handle. Draws
 * arrive from next_seq on, in order and exactly once, bit-identical to
 * those of a session that never stopped; a finished session sends its kept
 * draws from next_seq and its summary again. Returns as
 * sluice_session_run, and SLUICE_ERR_SERVER with gRPC code 5 (NOT_FOUND,
 * field "session_id") for an unknown session or a wrong session token,
 * 11 (OUT_OF_RANGE) when the draws from next_seq are no longer kept;
 * SLUICE_ERR_UNAVAILABLE from a server that keeps no state (after the tries
 * sluice_session_set_resume allows, as for a server still restarting). SLUICE_ERR_USAGE,
 * nothing sent, for a NULL or empty session_id or session_token. The
 * handle then answers sluice_session_id, _token and _next_seq for a
 * further resume. */
int sluice_session_resume(sluice_session *s, const char *target, const char *session_id, const char *session_token,
                          uint64_t next_seq);

/* After sluice_session_run, _resume or _follow: the sequence number after
 * the last draw received (0, next_seq or from_seq when none arrived):
 * where sluice_session_resume or a new follow continues without loss or
 * duplicate. */
uint64_t sluice_session_next_seq(const sluice_session *s);

/* After sluice_session_run, _resume or _follow: the times the handle
 * resumed by itself on a new stream (sluice_session_set_resume). */
int sluice_session_resumes(const sluice_session *s);

/* Fills *out with the summary; returns SLUICE_OK, or SLUICE_ERR_STATE when
 * no summary was received. */
int sluice_session_summary(const sluice_session *s, sluice_summary *out);

/* The last error: its message (the server's status message, or the
 * client's), the offending field and its description from the status's
 * bad-request detail ("" when there is none), and the gRPC status code
 * (0 when the error did not come from a status). */
const char *sluice_session_error_message(const sluice_session *s);
const char *sluice_session_error_field(const sluice_session *s);
const char *sluice_session_error_description(const sluice_session *s);
int sluice_session_grpc_code(const sluice_session *s);

/* The session id the server gave ("" before Registered). */
const char *sluice_session_id(const sluice_session *s);

/* The session's own token the server gave with its id (32 hex digits; ""
 * before Registered): what sluice_session_follow needs to follow this
 * session, and sluice_session_resume to continue it. Anyone holding the
 * id and this token can read the session's draws: keep it as private as
 * a password, and hand it only to the followers meant to read them. It is
 * not the server's bearer token. */
const char *sluice_session_token(const sluice_session *s);

/* Frees the handle and everything it owns; NULL is allowed. */
void sluice_session_free(sluice_session *s);

/* Checks that a binding's copies of the structs have the sizes this
 * library was built with (the Fortran module calls it): returns SLUICE_OK,
 * or SLUICE_ERR_USAGE with the first mismatch in *message. */
int sluice_check_layout(int64_t spec, int64_t batch, int64_t draws, int64_t progress, int64_t summary,
                        const char **message);

/* A constant name for a sluice_code, e.g. "SLUICE_ERR_INVALID_ARGUMENT". */
const char *sluice_error_name(int code);

/* Words for a sluice_reason, e.g. "draws collected". */
const char *sluice_reason_name(int reason);

#ifdef __cplusplus
}
#endif

#endif /* SLUICE_H */
