// sluice/client.hpp: the C++ client of the sluice service.
//
// sluice::run opens one Session stream, registers the target, answers every
// request of the server with the caller's batch evaluator, hands draws and
// progress to callbacks, and returns the summary:
//
//   auto channel = sluice::connect("127.0.0.1:7070");
//   sluice::Spec spec;
//   spec.dim = 2; spec.chains = 8; spec.start = {0, 0}; spec.step = 0.1;
//   spec.draws_per_chain = 1000;
//   sluice::Summary s = sluice::run(channel, spec, [&](sluice::Batch& b) {
//     for (int r = 0; r < b.rows; ++r) { /* b.gradients[r*b.dim + c] = ... */ }
//   });
//
// Arrays are flat, row-major std::vector<double> or pointers: element (r, c)
// of an R x C array is at r*C + c. Everything the evaluator returns is of
// log pi (log density up to a constant, its gradient, its Hessian), never of
// -log pi. The wire API, every field documented: proto/sluice/v1/sluice.proto.
#ifndef SLUICE_CLIENT_HPP
#define SLUICE_CLIENT_HPP

#include <cstdint>
#include <functional>
#include <memory>
#include <optional>
#include <stdexcept>
#include <string>
#include <vector>

namespace grpc {
class Channel;
}

namespace sluice {

// The message limit used when Spec::max_message_bytes is 0 (the wire API's
// default, and gRPC's).
constexpr std::int64_t kDefaultMaxMessageBytes = 4 << 20;

// Curvature of the potential -log pi: m I <= Hessian <= M I everywhere.
struct Curvature {
  double strong_convexity = 0;  // m >= 0
  double smoothness = 0;        // M > 0
  double start_distance = 0;    // bound on W2(start, pi); 0: sqrt(dim/m)
  double second_moment = 0;     // mu_2, for m = 0 with a TV target
  std::vector<double> penalty_centre;  // dim values or empty
};

enum class Metric { Default, TV, W2 };

// Accuracy targets; 0 is not a target.
struct Wants {
  double min_bulk_ess = 0, min_tail_ess = 0, max_rhat = 0, max_ksd = 0;
  double eps = 0;  // guaranteed error in metric; needs curvature
  Metric metric = Metric::Default;
};

// Stochastic gradients: declared variance and bias (0: not declared), data
// and minibatch sizes (for epochs), replicates per point (0: 1).
struct Noise {
  double variance = 0, bias = 0;
  std::int64_t data_size = 0, minibatch_size = 0;
  int replicates = 0;
};

// Decreasing step of "sgld": epsilon_t = a (b + t)^(-gamma), h_t = epsilon_t / 2.
struct Schedule {
  double a = 0, b = 0, gamma = 0;
};

// Gaussian envelope N(mean, scale^2 I) of "rejection", with the declared
// bound pi_tilde <= exp(log_bound) q.
struct Envelope {
  std::vector<double> mean;  // dim values
  double scale = 0, log_bound = 0;
};

// Spec describes a session; see the Register message of the wire API for
// each field's meaning. 0 (or empty) takes the server's default.
struct Spec {
  int dim = 0, chains = 0;
  std::string kernel;  // "" means "lmc"
  // dim values (every chain starts there) or chains x dim.
  std::vector<double> start;
  double step = 0;
  std::int64_t burn_in = 0, keep_every = 0, draws_per_chain = 0;
  std::int64_t max_evaluations = 0;
  double max_seconds = 0;
  std::int64_t progress_every_steps = 0;
  double progress_interval_seconds = 0;
  std::uint64_t seed = 0;
  std::vector<std::string> names;
  // Largest message either way; 0 means 4 MiB. Set on the channel by
  // connect() and sent to the server, which splits requests to fit.
  std::int64_t max_message_bytes = 0;
  std::optional<Curvature> curvature;
  Wants wants;
  double friction = 0, inverse_mass = 0;
  double krylov_tolerance = 0;
  int krylov_max_iterations = 0;
  std::optional<Noise> noise;
  int curvature_probe_iterations = 0;
  double slice_width = 0;
  int slice_max_expansions = 0;
  std::optional<Schedule> schedule;  // "sgld" with a decreasing step (step 0)
  int anchor_every = 0;              // "svrg"
  double fixed_point_tolerance = 0;  // "sgld-cv"
  int fixed_point_iterations = 0;    // "sgld-cv"
  std::optional<Envelope> envelope;  // "rejection"
};

// Batch is one set of points the server asks for. The evaluator fills the
// outputs that are wanted; the others are null. Pointers are valid during
// the call only.
struct Batch {
  int rows = 0, dim = 0;
  bool want_gradient = false, want_log_density = false;
  bool want_hessian = false, want_hessian_vector = false;
  int replicates = 1;      // gradient estimates per row
  bool full_data = false;  // evaluate with the whole data set
  const double* points = nullptr;     // rows x dim
  const std::int32_t* chains = nullptr;  // rows
  const std::int32_t* groups = nullptr;  // rows, or null
  const double* vectors = nullptr;    // rows x dim (Hessian-vector)
  double* gradients = nullptr;        // rows x replicates x dim
  double* log_densities = nullptr;    // rows
  double* hessians = nullptr;         // rows x dim x dim
  double* hessian_vectors = nullptr;  // rows x dim

  // Row r of points.
  const double* point(int r) const { return points + static_cast<std::size_t>(r) * dim; }
};

// The evaluator. Throwing stops the session: the client sends Stop, still
// receives the draws already made and the summary, and run() throws an
// Error with code Code::Evaluator carrying the exception's message.
using Evaluator = std::function<void(Batch&)>;

// A block of draws numbered seq, seq+1, ..., seq+rows-1 (checked for gaps).
struct Draws {
  std::uint64_t seq = 0;
  int rows = 0, dim = 0;
  const double* values = nullptr;  // rows x dim
  const std::int32_t* chains = nullptr;
  const std::int64_t* iterations = nullptr;
};

struct ParameterDiagnostics {
  std::string name;
  double mean = 0, sd = 0, rhat = 0, bulk_ess = 0, tail_ess = 0, mcse_mean = 0;
};

struct Bound {
  Metric metric = Metric::Default;
  double value = 0;
  bool guaranteed = false;
  std::string label;
  double start_term = 0, discretisation_term = 0, noise_term = 0, bias_term = 0;
};

enum class State { Unspecified, BurnIn, Sampling, Finished };

// Progress: budget and measured accuracy; -1 means no limit / not available.
struct Progress {
  State state = State::Unspecified;
  std::int64_t steps = 0, evaluations_used = 0, evaluations_left = 0, draws_sent = 0;
  double seconds_used = 0, seconds_left = 0, evaluations_per_second = 0;
  double ksd = -1;
  std::vector<ParameterDiagnostics> parameters;
  std::optional<Bound> bound;
};

struct Registered {
  std::string session_id, kernel;
  // The session's own secret (Registered.resume_token on the wire: 32 hex
  // digits, issued once). follow() of this session, from any client, needs
  // it, and so does resuming it; keep it as private as a password. It is
  // not the server's bearer token (Security::token), which admits a client
  // to the server at all: a follower of a server with --token-file sends
  // both.
  std::string resume_token;
  // True when this answers resume(): the session continues from its latest
  // checkpoint.
  bool resumed = false;
  std::uint64_t seed = 0;
  double step = 0;
  std::int64_t evaluations_per_step = 0, max_message_bytes = 0, planned_steps = 0;
  std::vector<std::string> names;
};

enum class Reason { None, BudgetSpent, TimeSpent, Stopped, DrawsCollected, Failed, Shutdown, TargetMet };

// Words for a reason, e.g. "draws collected".
const char* reason_name(Reason r);

struct Parameter {
  std::string name;
  double mean = 0, sd = 0;
  std::int64_t count = 0;
};

// Summary is what a finished session reports.
struct Summary {
  Registered registered;
  Reason reason = Reason::None;
  std::string message;
  Progress progress;
  std::vector<Parameter> parameters;
  int parameters_omitted = 0;
  std::int64_t draws_received = 0;
  // The sequence number after the last draw received: where a follow()
  // interrupted by an error resumes without loss or duplicate.
  std::uint64_t next_seq = 0;
  // Times the client resumed the session (or the follow) by itself on a
  // new stream after the one before broke (ResumePolicy).
  int resumes = 0;
};

// ResumePolicy bounds how run(), resume() and follow() resume by themselves
// when their stream breaks: gRPC UNAVAILABLE (the server was killed,
// restarts, or shut down having checkpointed the session; a connection
// reset), a reset stream (INTERNAL or UNKNOWN naming RST_STREAM or a reset
// connection), or a stream that ended without a Finished frame. The client
// then opens a new stream whose first frame is Resume with the session id,
// its token and the next sequence number it needs, so on_draws sees every
// draw once, in order, with no gap; the evaluator may be asked again for
// points it evaluated before the break. Up to attempts tries in a row,
// waiting first_wait, 2 first_wait, 4 first_wait, ... seconds, never more
// than max_wait; a try that gets the session back resets the count. A
// session that the server never registered is not resumed (there is
// nothing to resume: the error comes at once). The server must keep state
// (sluice serve --state-dir or --state-postgres) for a session to outlive
// it; a follow() resumes on any server that still has the rows.
struct ResumePolicy {
  int attempts = 10;       // <= 0: never resume, errors are thrown at once
  double first_wait = 0.1;  // seconds; <= 0 means 0.1
  double max_wait = 5;      // seconds; <= 0 means 5
};

// Callbacks run on the thread that called run().
struct Callbacks {
  std::function<void(const Registered&)> on_registered;
  std::function<void(const Draws&)> on_draws;
  std::function<void(const Progress&)> on_progress;
};

// What went wrong; the numbers are those of the C interface's sluice_code.
enum class Code {
  InvalidArgument = 1,
  ResourceExhausted = 2,
  DeadlineExceeded = 3,
  Unavailable = 4,
  Cancelled = 5,
  Server = 6,
  Evaluator = 7,
  Protocol = 8,
  Usage = 9,
  Unauthenticated = 11,  // gRPC UNAUTHENTICATED: no token, or one the server does not accept
};

// Error is thrown by run(). For a server status, grpc_code is the gRPC
// status code, message the status message, and field/description the first
// field violation of its google.rpc.BadRequest detail ("" without one).
// summary holds what the server sent before failing (a Finished frame with
// reason FAILED), when it sent one.
class Error : public std::runtime_error {
 public:
  Error(Code code, int grpc_code, std::string message, std::string field = "", std::string description = "");
  Code code;
  int grpc_code;
  std::string message, field, description;
  std::optional<Summary> summary;
};

// Security says how connect() protects the connection and authenticates.
//
// TLS is used when tls is true or any file is named: ca_file holds the PEM
// authorities trusted to sign the server's certificate ("" : the system's
// roots); cert_file and key_file, both or neither, hold the client's own
// certificate and key for a server requiring mutual TLS (sluice serve
// --client-ca). Without TLS the connection is plain text, which connect()
// allows only to a loopback host (127.0.0.0/8, ::1, localhost) or a Unix
// socket unless insecure is true.
//
// A bearer token (token, or the first line of token_file that is neither
// blank nor a # comment, surrounding white space trimmed; not both) is sent
// with every call as the metadata "authorization: Bearer <token>", what a
// server started with --token-file checks. Over plain text it can be read
// by anyone on the path: keep that to loopback.
struct Security {
  bool tls = false;
  std::string ca_file, cert_file, key_file;
  std::string token, token_file;
  bool insecure = false;
};

// connect returns a channel to target ("host:port", or a gRPC target such
// as "unix:///path") whose send and receive limits are both
// max_message_bytes (0: 4 MiB); use the same value in
// Spec::max_message_bytes. The channel reconnects after a lost connection
// within 0.1 s at first, backing off to at most 5 s between attempts (gRPC's
// own default grows to 2 min), so that a resume finds a restarted server
// soon. It throws Error (Code::Usage, nothing sent) for
// plain text to a host that is not loopback without Security::insecure,
// an unreadable file, a certificate without its key, or an empty token.
// The connection itself is made by the first call.
std::shared_ptr<grpc::Channel> connect(const std::string& target, const Security& security,
                                       std::int64_t max_message_bytes = 0);

// connect without TLS or token: plain text, to loopback only.
std::shared_ptr<grpc::Channel> connect(const std::string& target, std::int64_t max_message_bytes = 0);

// is_loopback reports whether target names a Unix socket or a loopback
// host, the only places connect() sends plain text to without
// Security::insecure.
bool is_loopback(const std::string& target);

// run runs one session on channel and returns its summary, or throws Error.
// A broken stream is resumed as policy says (by default: yes, up to 10
// tries in a row); on_registered is called once, for the first Registered.
Summary run(const std::shared_ptr<grpc::Channel>& channel, const Spec& spec, const Evaluator& evaluate,
            const Callbacks& callbacks = {}, const ResumePolicy& policy = {});

// resume continues session session_id after its stream broke or its
// server restarted (the Session rpc with a Resume frame in place of
// Register), on a server that keeps checkpoints (sluice serve --state-dir
// or --state-postgres). session_token is Registered::resume_token of the
// session (not the server's bearer token, which goes on the channel as for
// run()); next_seq is the first draw the caller does not have
// (Summary::next_seq of what it received, or the last Draws::seq + rows
// seen by on_draws; 0 for none). The server answers Registered again (same
// id and token, resumed true) to on_registered, sends the draws from
// next_seq on to on_draws, exactly once and in order, and asks evaluate
// for points as run() does: it must be the session's own target, and may
// be asked for points it evaluated before (the draws are bit-identical to
// those of a session that never stopped). A finished session answers with
// its kept draws from next_seq and its summary again. Errors as for run(),
// and: Code::Server with grpc_code 5 (NOT_FOUND, field "session_id") for an
// unknown id or a wrong token, 11 (OUT_OF_RANGE) when the draws from
// next_seq are no longer kept; Code::Unavailable from a server that keeps
// no state. The channel's message limit is the one the session was
// registered with (connect(..., spec.max_message_bytes)). A stream that
// breaks, the first one included (a server still restarting), is resumed
// again as policy says.
Summary resume(const std::shared_ptr<grpc::Channel>& channel, const std::string& session_id,
               const std::string& session_token, std::uint64_t next_seq, const Evaluator& evaluate,
               const Callbacks& callbacks = {}, const ResumePolicy& policy = {});

// The receive limit a follower's channel should have: a Follow frame can be
// as large as the server's own limit (sluice serve --max-message-bytes,
// 16 MiB by default). connect(target, security, kFollowMaxMessageBytes).
constexpr std::int64_t kFollowMaxMessageBytes = 64 << 20;

// follow streams the draws of session session_id (Registered::session_id)
// from sequence number from_seq on, to a consumer other than the session's
// client (the Follow rpc): each block goes to on_draws in sequence order,
// exactly once, and follow returns the session's summary once its final
// frame arrives (its registered part empty, draws_received counting this
// follower's rows). session_token is that session's own secret
// (Registered::resume_token), required: an empty one is Code::Usage with
// nothing sent, and a wrong one gets the same answer as an unknown
// session_id (Code::Server, grpc_code 5 NOT_FOUND, field "session_id"), so
// that a caller without it learns nothing about which sessions exist. The
// server's bearer token, when the server wants one, is a different thing:
// it is set on the channel (Security) and sent as for run(). On an error
// (NOT_FOUND, OUT_OF_RANGE when the rows asked for have left the server's
// bounded buffer, a broken connection) follow throws Error whose summary
// holds what was received: resume with
// follow(channel, session_id, session_token, e.summary->next_seq, on_draws).
// A broken stream is followed again from the next draw by itself first, as
// policy says.
Summary follow(const std::shared_ptr<grpc::Channel>& channel, const std::string& session_id,
               const std::string& session_token, std::uint64_t from_seq,
               const std::function<void(const Draws&)>& on_draws, const ResumePolicy& policy = {});

}  // namespace sluice

#endif  // SLUICE_CLIENT_HPP
