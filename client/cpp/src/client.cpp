// client.cpp: the session loop of the C++ client (see sluice/client.hpp).
#include "sluice/client.hpp"

#include <grpcpp/grpcpp.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <cstring>
#include <exception>
#include <fstream>
#include <map>
#include <sstream>
#include <thread>
#include <utility>

#include "sluice/v1/sluice.grpc.pb.h"
#include "sluice/v1/sluice.pb.h"
#include "sluice_cpp_rpc.pb.h"

namespace sluice {

namespace pb = ::sluice::v1;

namespace {

// Wire arrays are little-endian IEEE-754 float64: a straight copy on a
// little-endian machine, a byte swap elsewhere.
#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__
constexpr bool kLittleEndian = true;
#else
constexpr bool kLittleEndian = false;
#endif

void get_floats(const std::string& b, std::vector<double>& out) {
  out.resize(b.size() / 8);
  if (kLittleEndian) {
    if (!out.empty()) std::memcpy(out.data(), b.data(), out.size() * 8);
    return;
  }
  for (std::size_t i = 0; i < out.size(); ++i) {
    std::uint64_t u = 0;
    for (int k = 7; k >= 0; --k) u = (u << 8) | static_cast<unsigned char>(b[8 * i + k]);
    std::memcpy(&out[i], &u, 8);
  }
}

void put_floats(const double* v, std::size_t n, std::string* out) {
  out->resize(8 * n);
  if (n == 0) return;
  if (kLittleEndian) {
    std::memcpy(&(*out)[0], v, 8 * n);
    return;
  }
  for (std::size_t i = 0; i < n; ++i) {
    std::uint64_t u;
    std::memcpy(&u, &v[i], 8);
    for (int k = 0; k < 8; ++k) (*out)[8 * i + k] = static_cast<char>((u >> (8 * k)) & 0xff);
  }
}

std::string floats_bytes(const std::vector<double>& v) {
  std::string s;
  put_floats(v.data(), v.size(), &s);
  return s;
}

pb::Metric metric_to_wire(Metric m) {
  switch (m) {
    case Metric::TV:
      return pb::METRIC_TV;
    case Metric::W2:
      return pb::METRIC_W2;
    default:
      return pb::METRIC_UNSPECIFIED;
  }
}

Metric metric_from_wire(pb::Metric m) {
  switch (m) {
    case pb::METRIC_TV:
      return Metric::TV;
    case pb::METRIC_W2:
      return Metric::W2;
    default:
      return Metric::Default;
  }
}

void register_frame(const Spec& spec, std::int64_t limit, pb::Register* r) {
  r->set_dim(spec.dim);
  r->set_chains(spec.chains);
  r->set_kernel(spec.kernel);
  const bool per_chain = spec.chains > 1 && spec.dim > 0 &&
                         spec.start.size() == static_cast<std::size_t>(spec.dim) * spec.chains;
  r->set_start(floats_bytes(spec.start));
  r->set_start_rows(per_chain ? spec.chains : 1);
  r->set_step(spec.step);
  r->set_burn_in(spec.burn_in);
  r->set_keep_every(spec.keep_every);
  r->set_draws_per_chain(spec.draws_per_chain);
  r->set_max_evaluations(spec.max_evaluations);
  r->set_max_seconds(spec.max_seconds);
  r->set_progress_every_steps(spec.progress_every_steps);
  r->set_progress_interval_seconds(spec.progress_interval_seconds);
  r->set_seed(spec.seed);
  for (const auto& n : spec.names) r->add_names(n);
  r->set_max_message_bytes(limit);
  if (spec.curvature) {
    auto* c = r->mutable_curvature();
    c->set_strong_convexity(spec.curvature->strong_convexity);
    c->set_smoothness(spec.curvature->smoothness);
    c->set_start_distance(spec.curvature->start_distance);
    c->set_second_moment(spec.curvature->second_moment);
    c->set_penalty_centre(floats_bytes(spec.curvature->penalty_centre));
  }
  const Wants& w = spec.wants;
  if (w.min_bulk_ess != 0 || w.min_tail_ess != 0 || w.max_rhat != 0 || w.max_ksd != 0 || w.eps != 0 ||
      w.metric != Metric::Default) {
    auto* pw = r->mutable_wants();
    pw->set_min_bulk_ess(w.min_bulk_ess);
    pw->set_min_tail_ess(w.min_tail_ess);
    pw->set_max_rhat(w.max_rhat);
    pw->set_max_ksd(w.max_ksd);
    pw->set_eps(w.eps);
    pw->set_metric(metric_to_wire(w.metric));
  }
  r->set_friction(spec.friction);
  r->set_inverse_mass(spec.inverse_mass);
  r->set_krylov_tolerance(spec.krylov_tolerance);
  r->set_krylov_max_iterations(spec.krylov_max_iterations);
  if (spec.noise) {
    auto* n = r->mutable_noise();
    n->set_kind(pb::GRADIENT_KIND_STOCHASTIC);
    n->set_variance(spec.noise->variance);
    n->set_bias(spec.noise->bias);
    n->set_data_size(spec.noise->data_size);
    n->set_minibatch_size(spec.noise->minibatch_size);
    n->set_replicates(spec.noise->replicates);
  }
  r->set_curvature_probe_iterations(spec.curvature_probe_iterations);
  r->set_slice_width(spec.slice_width);
  r->set_slice_max_expansions(spec.slice_max_expansions);
  if (spec.schedule) {
    auto* sc = r->mutable_schedule();
    sc->set_a(spec.schedule->a);
    sc->set_b(spec.schedule->b);
    sc->set_gamma(spec.schedule->gamma);
  }
  r->set_anchor_every(spec.anchor_every);
  r->set_fixed_point_tolerance(spec.fixed_point_tolerance);
  r->set_fixed_point_iterations(spec.fixed_point_iterations);
  if (spec.envelope) {
    auto* e = r->mutable_envelope();
    e->set_mean(floats_bytes(spec.envelope->mean));
    e->set_scale(spec.envelope->scale);
    e->set_log_bound(spec.envelope->log_bound);
  }
}

Reason reason_from_wire(pb::FinishReason r) {
  switch (r) {
    case pb::FINISH_REASON_BUDGET_SPENT:
      return Reason::BudgetSpent;
    case pb::FINISH_REASON_TIME_SPENT:
      return Reason::TimeSpent;
    case pb::FINISH_REASON_STOPPED:
      return Reason::Stopped;
    case pb::FINISH_REASON_DRAWS_COLLECTED:
      return Reason::DrawsCollected;
    case pb::FINISH_REASON_FAILED:
      return Reason::Failed;
    case pb::FINISH_REASON_SHUTDOWN:
      return Reason::Shutdown;
    case pb::FINISH_REASON_TARGET_MET:
      return Reason::TargetMet;
    default:
      return Reason::None;
  }
}

Progress progress_from_wire(const pb::Progress& p) {
  Progress out;
  switch (p.state()) {
    case pb::STATE_BURN_IN:
      out.state = State::BurnIn;
      break;
    case pb::STATE_SAMPLING:
      out.state = State::Sampling;
      break;
    case pb::STATE_FINISHED:
      out.state = State::Finished;
      break;
    default:
      break;
  }
  out.steps = p.steps();
  out.evaluations_used = p.evaluations_used();
  out.evaluations_left = p.evaluations_left();
  out.draws_sent = p.draws_sent();
  out.seconds_used = p.seconds_used();
  out.seconds_left = p.seconds_left();
  out.evaluations_per_second = p.evaluations_per_second();
  out.ksd = p.ksd();
  for (const auto& d : p.parameters()) {
    out.parameters.push_back(
        ParameterDiagnostics{d.name(), d.mean(), d.sd(), d.rhat(), d.bulk_ess(), d.tail_ess(), d.mcse_mean()});
  }
  if (p.has_bound()) {
    const auto& b = p.bound();
    out.bound = Bound{metric_from_wire(b.metric()), b.value(), b.source() == pb::BOUND_SOURCE_DECLARED, b.label(),
                      b.start_term(), b.discretisation_term(), b.noise_term(), b.bias_term()};
  }
  return out;
}

Code code_from_status(grpc::StatusCode c) {
  switch (c) {
    case grpc::StatusCode::INVALID_ARGUMENT:
      return Code::InvalidArgument;
    case grpc::StatusCode::RESOURCE_EXHAUSTED:
      return Code::ResourceExhausted;
    case grpc::StatusCode::DEADLINE_EXCEEDED:
      return Code::DeadlineExceeded;
    case grpc::StatusCode::UNAVAILABLE:
      return Code::Unavailable;
    case grpc::StatusCode::CANCELLED:
      return Code::Cancelled;
    case grpc::StatusCode::UNAUTHENTICATED:
      return Code::Unauthenticated;
    default:
      return Code::Server;
  }
}

// error_from_status builds the Error of a failed call, with the first field
// violation of the status's google.rpc.BadRequest detail when there is one
// (a malformed detail leaves field and description empty: the code and the
// message are still reported).
Error error_from_status(const grpc::Status& st) {
  Error e(code_from_status(st.error_code()), static_cast<int>(st.error_code()), st.error_message());
  const std::string& raw = st.error_details();
  sluice_cpp::rpc::Status rich;
  if (raw.empty() || !rich.ParseFromString(raw)) return e;
  static const std::string kBadRequest = "/google.rpc.BadRequest";
  for (const auto& d : rich.details()) {
    const std::string& url = d.type_url();
    if (url.size() < kBadRequest.size() ||
        url.compare(url.size() - kBadRequest.size(), kBadRequest.size(), kBadRequest) != 0) {
      continue;
    }
    sluice_cpp::rpc::BadRequest bad;
    if (bad.ParseFromString(d.value()) && bad.field_violations_size() > 0) {
      e.field = bad.field_violations(0).field();
      e.description = bad.field_violations(0).description();
      break;
    }
  }
  return e;
}

// EvaluatorStop carries an evaluator's failure until the session has ended.
struct EvaluatorStop {
  std::string message;
};

// resumable reports whether a stream's status is a break worth resuming
// after: UNAVAILABLE, or a reset stream reported as INTERNAL or UNKNOWN.
bool resumable(const grpc::Status& st) {
  if (st.error_code() == grpc::StatusCode::UNAVAILABLE) return true;
  if (st.error_code() != grpc::StatusCode::INTERNAL && st.error_code() != grpc::StatusCode::UNKNOWN) return false;
  std::string m;
  for (char c : st.error_message()) m.push_back(static_cast<char>(std::tolower(static_cast<unsigned char>(c))));
  return m.find("rst_stream") != std::string::npos || m.find("stream reset") != std::string::npos ||
         m.find("connection reset") != std::string::npos;
}

// wait sleeps before resume try n (0-based): first_wait * 2^n seconds, at
// most max_wait.
void wait(const ResumePolicy& p, int n) {
  const double first = p.first_wait > 0 ? p.first_wait : 0.1;
  const double most = p.max_wait > 0 ? p.max_wait : 5;
  double d = first;
  for (int i = 0; i < n && d < most; ++i) d *= 2;
  std::this_thread::sleep_for(std::chrono::duration<double>(std::min(d, most)));
}

class Runner {
 public:
  Runner(const Spec& spec, const Evaluator& eval, const Callbacks& cb, const ResumePolicy& policy)
      : spec_(spec), eval_(eval), cb_(cb), policy_(policy) {}

  // follow reads Follow streams: draws and the final frame, following
  // again from the next draw after a broken stream as policy_ says.
  Summary follow(pb::SluiceService::Stub& stub, const std::string& session_id, const std::string& token,
                 std::uint64_t from_seq) {
    next_seq_ = from_seq;
    sum_.next_seq = from_seq;
    bool again = false;  // this stream follows again after a broken one
    for (int tries = 0;;) {
      const std::uint64_t before = next_seq_;
      ctx_ = std::make_unique<grpc::ClientContext>();
      pb::FollowRequest req;
      req.set_session_id(session_id);
      req.set_token(token);
      req.set_from_seq(next_seq_);
      auto reader = stub.Follow(ctx_.get(), req);
      std::string protocol_error;
      pb::FollowResponse frame;
      while (protocol_error.empty() && reader->Read(&frame)) {
        switch (frame.frame_case()) {
          case pb::FollowResponse::kDraws:
            protocol_error = deliver(frame.draws());
            break;
          case pb::FollowResponse::kFinished:
            finish(frame.finished());
            break;
          default:
            break;
        }
      }
      if (!protocol_error.empty()) ctx_->TryCancel();
      grpc::Status st = reader->Finish();
      // A follower's summary is what it received, finished or not.
      if (!protocol_error.empty()) {
        Error e(Code::Protocol, 0, "sluice: " + protocol_error);
        e.summary = sum_;
        throw e;
      }
      if (again && (next_seq_ != before || finished_)) ++sum_.resumes;
      if (st.ok() && finished_) return sum_;
      if (next_seq_ != before) tries = 0;  // this stream made progress
      again = policy_.attempts > 0 && tries < policy_.attempts && !finished_ && (st.ok() || resumable(st));
      if (again) {
        wait(policy_, tries++);
        continue;
      }
      if (!st.ok()) {
        Error e = error_from_status(st);
        e.summary = sum_;
        throw e;
      }
      Error e(Code::Protocol, 0, "sluice: follow stream ended without a finished frame");
      e.summary = sum_;
      throw e;
    }
  }

  // run runs a session: with resume null it registers spec_, otherwise its
  // first frame is *resume and draws are expected from resume->next_seq().
  // A broken stream of a registered session is resumed as policy_ says,
  // with Resume from the next draw expected.
  Summary run(pb::SluiceService::Stub& stub, std::int64_t limit, const pb::Resume* resume = nullptr) {
    pb::SessionRequest first;
    std::string id, token;
    if (resume != nullptr) {
      *first.mutable_resume() = *resume;
      next_seq_ = resume->next_seq();
      sum_.next_seq = next_seq_;
      id = resume->session_id();
      token = resume->token();
    } else {
      register_frame(spec_, limit, first.mutable_register_());
    }
    for (int tries = 0;;) {
      std::string protocol_error;
      const grpc::Status st = stream(stub, first, &protocol_error);
      if (!protocol_error.empty()) throw with_summary(Error(Code::Protocol, 0, "sluice: " + protocol_error));
      if (st.ok() && finished_) break;
      if (registered_) {  // this stream got the session back
        tries = 0;
        id = sum_.registered.session_id;
        token = sum_.registered.resume_token;
      }
      const bool again = policy_.attempts > 0 && tries < policy_.attempts && !finished_ && !stop_ &&
                         !id.empty() && !token.empty() && (st.ok() || resumable(st));
      if (!again) {
        if (!st.ok()) throw with_summary(error_from_status(st));
        throw with_summary(Error(Code::Protocol, 0, "sluice: stream ended without a finished frame"));
      }
      wait(policy_, tries++);
      first.Clear();
      auto* r = first.mutable_resume();
      r->set_session_id(id);
      r->set_token(token);
      r->set_next_seq(next_seq_);
    }
    if (stop_) throw with_summary(Error(Code::Evaluator, 0, "sluice: evaluator failed: " + stop_->message));
    return sum_;
  }

 private:
  // stream runs one Session stream whose first frame is first until it
  // ends, and returns its status; a protocol error found in its frames
  // cancels it and is set in *protocol_error.
  grpc::Status stream(pb::SluiceService::Stub& stub, const pb::SessionRequest& first, std::string* protocol_error) {
    ctx_ = std::make_unique<grpc::ClientContext>();
    finished_ = send_closed_ = registered_ = false;
    stream_ = stub.Session(ctx_.get());
    if (!stream_->Write(first)) send_closed_ = true;  // the status says why
    pb::SessionResponse frame;
    while (protocol_error->empty() && stream_->Read(&frame)) {
      switch (frame.frame_case()) {
        case pb::SessionResponse::kRegistered:
          registered(frame.registered());
          break;
        case pb::SessionResponse::kPoints:
          if (stop_ || send_closed_) break;  // Stop already sent, or the server is finishing
          *protocol_error = answer(frame.points());
          break;
        case pb::SessionResponse::kDraws:
          *protocol_error = deliver(frame.draws());
          break;
        case pb::SessionResponse::kProgress:
          if (cb_.on_progress) cb_.on_progress(progress_from_wire(frame.progress()));
          break;
        case pb::SessionResponse::kFinished:
          finish(frame.finished());
          break;
        default:
          break;
      }
    }
    if (!protocol_error->empty()) ctx_->TryCancel();
    stream_->WritesDone();
    grpc::Status st = stream_->Finish();
    stream_.reset();
    return st;
  }

  Error with_summary(Error e) const {
    if (finished_) e.summary = sum_;
    return e;
  }

  void registered(const pb::Registered& g) {
    Registered& r = sum_.registered;
    r.session_id = g.session_id();
    r.resume_token = g.resume_token();
    r.resumed = g.resumed();
    r.kernel = g.kernel();
    r.seed = g.seed();
    r.step = g.step();
    r.evaluations_per_step = g.evaluations_per_step();
    r.max_message_bytes = g.max_message_bytes();
    r.planned_steps = g.planned_steps();
    r.names.assign(g.names().begin(), g.names().end());
    registered_ = true;
    if (announced_) {
      ++sum_.resumes;
      return;
    }
    announced_ = true;
    if (cb_.on_registered) cb_.on_registered(r);
  }

  // answer evaluates one Points frame and sends its Evaluations (or Stop
  // when the evaluator throws). It returns a protocol error, or "".
  std::string answer(const pb::Points& p) {
    const int rows = p.rows(), dim = p.dim();
    if (rows < 0 || dim < 1) return "malformed points frame: rows " + std::to_string(rows) + ", dim " + std::to_string(dim);
    const std::size_t n = static_cast<std::size_t>(rows) * dim;
    if (p.points().size() != 8 * n || p.chains_size() != rows) {
      return "malformed points frame: " + std::to_string(p.points().size()) + " bytes and " +
             std::to_string(p.chains_size()) + " chains for " + std::to_string(rows) + "x" + std::to_string(dim);
    }
    Batch b;
    b.rows = rows;
    b.dim = dim;
    for (int q : p.quantities()) {
      switch (q) {
        case pb::QUANTITY_GRADIENT:
          b.want_gradient = true;
          break;
        case pb::QUANTITY_LOG_DENSITY:
          b.want_log_density = true;
          break;
        case pb::QUANTITY_HESSIAN:
          b.want_hessian = true;
          break;
        case pb::QUANTITY_HESSIAN_VECTOR:
          b.want_hessian_vector = true;
          break;
        default:
          break;
      }
    }
    b.replicates = p.replicates() > 1 ? p.replicates() : 1;
    b.full_data = p.full_data();
    get_floats(p.points(), points_);
    b.points = points_.data();
    b.chains = p.chains().data();
    if (p.minibatch_groups_size() > 0) {
      if (p.minibatch_groups_size() != rows) return "malformed points frame: minibatch_groups length";
      b.groups = p.minibatch_groups().data();
    }
    if (b.want_gradient) {
      grad_.assign(n * b.replicates, 0.0);
      b.gradients = grad_.data();
    }
    if (b.want_log_density) {
      logd_.assign(rows, 0.0);
      b.log_densities = logd_.data();
    }
    if (b.want_hessian) {
      hess_.assign(n * dim, 0.0);
      b.hessians = hess_.data();
    }
    if (b.want_hessian_vector) {
      if (p.vectors().size() != 8 * n) return "malformed points frame: vectors length";
      get_floats(p.vectors(), vectors_);
      b.vectors = vectors_.data();
      hessvec_.assign(n, 0.0);
      b.hessian_vectors = hessvec_.data();
    }
    try {
      eval_(b);
    } catch (const std::exception& e) {
      stop_ = EvaluatorStop{e.what()};
    } catch (...) {
      stop_ = EvaluatorStop{"unknown exception"};
    }
    if (stop_) {
      pb::SessionRequest req;
      req.mutable_stop()->set_reason("evaluator failed: " + stop_->message);
      if (!stream_->Write(req)) send_closed_ = true;
      return "";
    }
    out_.Clear();
    auto* ev = out_.mutable_evaluations();
    ev->set_request_id(p.request_id());
    ev->set_first_row(p.first_row());
    ev->set_rows(rows);
    ev->set_dim(dim);
    if (b.want_gradient) put_floats(grad_.data(), grad_.size(), ev->mutable_gradients());
    if (b.want_log_density) put_floats(logd_.data(), logd_.size(), ev->mutable_log_densities());
    if (b.want_hessian) put_floats(hess_.data(), hess_.size(), ev->mutable_hessians());
    if (b.want_hessian_vector) put_floats(hessvec_.data(), hessvec_.size(), ev->mutable_hessian_vectors());
    // A failed write means the server ended the stream: Read still delivers
    // what it sent before (the Finished frame), then Finish its status.
    if (!stream_->Write(out_)) send_closed_ = true;
    return "";
  }

  std::string deliver(const pb::Draws& w) {
    if (w.seq() != next_seq_) {
      return "draws lost or repeated: got sequence " + std::to_string(w.seq()) + ", expected " +
             std::to_string(next_seq_);
    }
    const std::size_t n = static_cast<std::size_t>(w.rows()) * w.dim();
    if (w.rows() < 0 || w.dim() < 0 || w.values().size() != 8 * n || w.chains_size() != w.rows() ||
        w.iterations_size() != w.rows()) {
      return "malformed draws frame at sequence " + std::to_string(w.seq());
    }
    next_seq_ += static_cast<std::uint64_t>(w.rows());
    sum_.next_seq = next_seq_;
    sum_.draws_received += w.rows();
    if (!cb_.on_draws) return "";
    get_floats(w.values(), draws_);
    Draws d;
    d.seq = w.seq();
    d.rows = w.rows();
    d.dim = w.dim();
    d.values = draws_.data();
    d.chains = w.chains().data();
    d.iterations = w.iterations().data();
    cb_.on_draws(d);
    return "";
  }

  void finish(const pb::Finished& f) {
    finished_ = true;
    sum_.reason = reason_from_wire(f.reason());
    sum_.message = f.message();
    sum_.progress = progress_from_wire(f.progress());
    sum_.parameters_omitted = f.parameters_omitted();
    sum_.parameters.clear();
    for (const auto& p : f.parameters()) sum_.parameters.push_back(Parameter{p.name(), p.mean(), p.sd(), p.count()});
  }

  const Spec& spec_;
  const Evaluator& eval_;
  const Callbacks& cb_;
  const ResumePolicy& policy_;
  std::unique_ptr<grpc::ClientContext> ctx_;  // one per stream
  std::unique_ptr<grpc::ClientReaderWriter<pb::SessionRequest, pb::SessionResponse>> stream_;
  Summary sum_;
  std::uint64_t next_seq_ = 0;
  // finished_, send_closed_ and registered_ are of the current stream;
  // announced_ is set once on_registered was called.
  bool finished_ = false, send_closed_ = false, registered_ = false, announced_ = false;
  std::optional<EvaluatorStop> stop_;
  pb::SessionRequest out_;
  std::vector<double> points_, vectors_, grad_, logd_, hess_, hessvec_, draws_;
};

}  // namespace

const char* reason_name(Reason r) {
  switch (r) {
    case Reason::BudgetSpent:
      return "budget spent";
    case Reason::TimeSpent:
      return "time spent";
    case Reason::Stopped:
      return "stopped by client";
    case Reason::DrawsCollected:
      return "draws collected";
    case Reason::Failed:
      return "failed";
    case Reason::Shutdown:
      return "server shutting down";
    case Reason::TargetMet:
      return "target met";
    default:
      return "not finished";
  }
}

Error::Error(Code c, int g, std::string msg, std::string f, std::string d)
    : std::runtime_error(msg), code(c), grpc_code(g), message(std::move(msg)), field(std::move(f)),
      description(std::move(d)) {}

namespace {

// read_file returns the whole of a file, or throws a usage Error naming it
// and what it is for.
std::string read_file(const std::string& path, const char* what) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw Error(Code::Usage, 0, std::string("sluice: connect: cannot read the ") + what + " " + path);
  std::ostringstream b;
  b << in.rdbuf();
  if (in.bad()) throw Error(Code::Usage, 0, std::string("sluice: connect: cannot read the ") + what + " " + path);
  return b.str();
}

std::string trim(const std::string& s) {
  std::size_t a = 0, b = s.size();
  while (a < b && std::isspace(static_cast<unsigned char>(s[a]))) ++a;
  while (b > a && std::isspace(static_cast<unsigned char>(s[b - 1]))) --b;
  return s.substr(a, b - a);
}

// token_of returns the token Security names ("" for none).
std::string token_of(const Security& sec) {
  if (!sec.token.empty() && !sec.token_file.empty()) {
    throw Error(Code::Usage, 0, "sluice: connect: give a token or a token file, not both");
  }
  if (sec.token_file.empty()) {
    const std::string t = trim(sec.token);
    if (t.empty() && !sec.token.empty()) throw Error(Code::Usage, 0, "sluice: connect: the token is blank");
    return t;
  }
  std::istringstream lines(read_file(sec.token_file, "token file"));
  for (std::string line; std::getline(lines, line);) {
    line = trim(line);
    if (!line.empty() && line[0] != '#') return line;
  }
  throw Error(Code::Usage, 0, "sluice: connect: token file " + sec.token_file + " holds no token (blank or # lines only)");
}

// BearerToken adds "authorization: Bearer <token>" to the initial metadata
// of every call on its channel. An interceptor rather than call
// credentials, because gRPC sends call credentials only over TLS and a
// server on the same machine may listen in plain text.
class BearerToken : public grpc::experimental::Interceptor {
 public:
  explicit BearerToken(std::string value) : value_(std::move(value)) {}
  void Intercept(grpc::experimental::InterceptorBatchMethods* m) override {
    if (m->QueryInterceptionHookPoint(grpc::experimental::InterceptionHookPoints::PRE_SEND_INITIAL_METADATA)) {
      m->GetSendInitialMetadata()->emplace("authorization", value_);
    }
    m->Proceed();
  }

 private:
  const std::string value_;
};

class BearerTokenFactory : public grpc::experimental::ClientInterceptorFactoryInterface {
 public:
  explicit BearerTokenFactory(std::string token) : value_("Bearer " + std::move(token)) {}
  grpc::experimental::Interceptor* CreateClientInterceptor(grpc::experimental::ClientRpcInfo*) override {
    return new BearerToken(value_);
  }

 private:
  const std::string value_;
};

bool has_prefix(const std::string& s, const char* p) { return s.compare(0, std::strlen(p), p) == 0; }

}  // namespace

bool is_loopback(const std::string& target) {
  if (has_prefix(target, "unix:") || has_prefix(target, "unix-abstract:")) return true;
  std::string t = target;
  // Strip a scheme and authority ("dns:///host:port", "ipv4:127.0.0.1:1").
  const std::size_t slash = t.find(":///");
  if (slash != std::string::npos) {
    t = t.substr(slash + 4);
  } else if (has_prefix(t, "dns://")) {
    t = t.substr(t.rfind('/') + 1);
  } else if (has_prefix(t, "ipv4:") || has_prefix(t, "ipv6:")) {
    t = t.substr(5);
  }
  std::string host = t;
  if (!t.empty() && t[0] == '[') {
    const std::size_t close = t.find(']');
    host = close == std::string::npos ? t : t.substr(1, close - 1);
  } else if (t.find(':') == t.rfind(':') && t.find(':') != std::string::npos) {
    host = t.substr(0, t.find(':'));  // host:port (an IPv6 literal has more colons)
  }
  std::string lower;
  for (char c : host) lower.push_back(static_cast<char>(std::tolower(static_cast<unsigned char>(c))));
  if (lower == "localhost" || lower == "::1") return true;
  // 127.0.0.0/8 written as a dotted quad: four numbers 0..255, the first 127.
  int parts = 0;
  std::size_t i = 0;
  bool first127 = false;
  while (i <= lower.size()) {
    const std::size_t dot = std::min(lower.find('.', i), lower.size());
    const std::string part = lower.substr(i, dot - i);
    if (part.empty() || part.size() > 3) return false;
    for (char c : part) {
      if (!std::isdigit(static_cast<unsigned char>(c))) return false;
    }
    const int v = std::stoi(part);
    if (v > 255) return false;
    if (parts == 0) first127 = v == 127;
    ++parts;
    i = dot + 1;
  }
  return parts == 4 && first127;
}

std::shared_ptr<grpc::Channel> connect(const std::string& target, const Security& sec, std::int64_t max_message_bytes) {
  if (target.empty()) throw Error(Code::Usage, 0, "sluice: connect: no target (want \"host:port\")");
  const std::int64_t limit = max_message_bytes > 0 ? max_message_bytes : kDefaultMaxMessageBytes;
  if (limit > INT32_MAX) throw Error(Code::Usage, 0, "sluice: connect: max_message_bytes above 2^31-1");
  if (sec.cert_file.empty() != sec.key_file.empty()) {
    throw Error(Code::Usage, 0, "sluice: connect: a client certificate needs its key, and a key its certificate");
  }
  const bool tls = sec.tls || !sec.ca_file.empty() || !sec.cert_file.empty();
  if (!tls && !sec.insecure && !is_loopback(target)) {
    throw Error(Code::Usage, 0, "sluice: connect: refusing a plain-text connection to \"" + target +
                                    "\", which is not a loopback address: use TLS, or insecure on a trusted network");
  }
  std::shared_ptr<grpc::ChannelCredentials> creds;
  if (tls) {
    grpc::SslCredentialsOptions o;
    if (!sec.ca_file.empty()) o.pem_root_certs = read_file(sec.ca_file, "CA file");
    if (!sec.cert_file.empty()) {
      o.pem_cert_chain = read_file(sec.cert_file, "client certificate");
      o.pem_private_key = read_file(sec.key_file, "client key");
    }
    creds = grpc::SslCredentials(o);
  } else {
    creds = grpc::InsecureChannelCredentials();
  }
  const std::string token = token_of(sec);
  grpc::ChannelArguments args;
  args.SetMaxReceiveMessageSize(static_cast<int>(limit));
  args.SetMaxSendMessageSize(static_cast<int>(limit));
  // Reconnect soon after a lost connection (gRPC's default backoff starts
  // at 1 s and grows to 2 min), so a resume finds a restarted server.
  args.SetInt(GRPC_ARG_INITIAL_RECONNECT_BACKOFF_MS, 100);
  args.SetInt(GRPC_ARG_MAX_RECONNECT_BACKOFF_MS, 5000);
  if (token.empty()) return grpc::CreateCustomChannel(target, creds, args);
  std::vector<std::unique_ptr<grpc::experimental::ClientInterceptorFactoryInterface>> icpt;
  icpt.push_back(std::make_unique<BearerTokenFactory>(token));
  return grpc::experimental::CreateCustomChannelWithInterceptors(target, creds, args, std::move(icpt));
}

std::shared_ptr<grpc::Channel> connect(const std::string& target, std::int64_t max_message_bytes) {
  return connect(target, Security{}, max_message_bytes);
}

Summary run(const std::shared_ptr<grpc::Channel>& channel, const Spec& spec, const Evaluator& evaluate,
            const Callbacks& callbacks, const ResumePolicy& policy) {
  if (!channel) throw Error(Code::Usage, 0, "sluice: run: null channel");
  if (!evaluate) throw Error(Code::Usage, 0, "sluice: run: no evaluator");
  const std::int64_t limit = spec.max_message_bytes > 0 ? spec.max_message_bytes : kDefaultMaxMessageBytes;
  if (limit > INT32_MAX) throw Error(Code::Usage, 0, "sluice: run: max_message_bytes above 2^31-1");
  auto stub = pb::SluiceService::NewStub(channel);
  Runner r(spec, evaluate, callbacks, policy);
  return r.run(*stub, limit);
}

Summary resume(const std::shared_ptr<grpc::Channel>& channel, const std::string& session_id,
               const std::string& session_token, std::uint64_t next_seq, const Evaluator& evaluate,
               const Callbacks& callbacks, const ResumePolicy& policy) {
  if (!channel) throw Error(Code::Usage, 0, "sluice: resume: null channel");
  if (!evaluate) throw Error(Code::Usage, 0, "sluice: resume: no evaluator");
  if (session_id.empty()) throw Error(Code::Usage, 0, "sluice: resume: no session id");
  if (session_token.empty()) {
    throw Error(Code::Usage, 0,
                "sluice: resume: no session token (the resume_token of the session's Registered, "
                "not the server's bearer token)");
  }
  static const Spec no_spec;
  pb::Resume frame;
  frame.set_session_id(session_id);
  frame.set_token(session_token);
  frame.set_next_seq(next_seq);
  auto stub = pb::SluiceService::NewStub(channel);
  Runner r(no_spec, evaluate, callbacks, policy);
  return r.run(*stub, 0, &frame);
}

Summary follow(const std::shared_ptr<grpc::Channel>& channel, const std::string& session_id,
               const std::string& session_token, std::uint64_t from_seq,
               const std::function<void(const Draws&)>& on_draws, const ResumePolicy& policy) {
  if (!channel) throw Error(Code::Usage, 0, "sluice: follow: null channel");
  if (session_id.empty()) throw Error(Code::Usage, 0, "sluice: follow: no session id");
  if (session_token.empty()) {
    throw Error(Code::Usage, 0,
                "sluice: follow: no session token (the resume_token of the session's Registered, "
                "not the server's bearer token)");
  }
  static const Spec no_spec;
  static const Evaluator no_evaluator;
  Callbacks cb;
  cb.on_draws = on_draws;
  auto stub = pb::SluiceService::NewStub(channel);
  Runner r(no_spec, no_evaluator, cb, policy);
  return r.follow(*stub, session_id, session_token, from_seq);
}

}  // namespace sluice
