// sluice_c.cpp: the C interface (sluice.h) over the C++ client. No
// exception crosses it: every entry point catches and turns failures into
// codes and messages kept in the handle.
#include "sluice.h"

#include <cstring>
#include <exception>
#include <functional>
#include <new>
#include <optional>
#include <stdexcept>
#include <string>
#include <vector>

#include "sluice/client.hpp"

namespace {

// FlatProgress keeps a Progress's per-parameter figures as arrays, so that
// a sluice_progress can point into them.
struct FlatProgress {
  std::vector<double> mean, sd, rhat, bulk_ess, tail_ess, mcse;

  void fill(const sluice::Progress& p, sluice_progress* out) {
    mean.clear();
    sd.clear();
    rhat.clear();
    bulk_ess.clear();
    tail_ess.clear();
    mcse.clear();
    for (const auto& d : p.parameters) {
      mean.push_back(d.mean);
      sd.push_back(d.sd);
      rhat.push_back(d.rhat);
      bulk_ess.push_back(d.bulk_ess);
      tail_ess.push_back(d.tail_ess);
      mcse.push_back(d.mcse_mean);
    }
    *out = sluice_progress{};
    out->state = static_cast<int32_t>(p.state);
    out->n_parameters = static_cast<int32_t>(p.parameters.size());
    out->steps = p.steps;
    out->evaluations_used = p.evaluations_used;
    out->evaluations_left = p.evaluations_left;
    out->draws_sent = p.draws_sent;
    out->seconds_used = p.seconds_used;
    out->seconds_left = p.seconds_left;
    out->evaluations_per_second = p.evaluations_per_second;
    out->ksd = p.ksd;
    if (p.bound) {
      out->has_bound = 1;
      out->bound_guaranteed = p.bound->guaranteed ? 1 : 0;
      out->bound_value = p.bound->value;
    }
    out->mean = mean.data();
    out->sd = sd.data();
    out->rhat = rhat.data();
    out->bulk_ess = bulk_ess.data();
    out->tail_ess = tail_ess.data();
    out->mcse_mean = mcse.data();
  }
};

std::vector<std::string> split_names(const char* names) {
  std::vector<std::string> out;
  if (names == nullptr || *names == '\0') return out;
  std::string cur;
  for (const char* c = names; *c != '\0'; ++c) {
    if (*c == ',') {
      out.push_back(cur);
      cur.clear();
    } else {
      cur.push_back(*c);
    }
  }
  out.push_back(cur);
  return out;
}

}  // namespace

struct sluice_session {
  sluice::Spec spec;
  std::string usage_error;  // a spec problem found by sluice_session_new
  sluice_evaluate_fn evaluate = nullptr;
  void* evaluate_data = nullptr;
  sluice_draws_fn on_draws = nullptr;
  void* draws_data = nullptr;
  sluice_progress_fn on_progress = nullptr;
  void* progress_data = nullptr;
  bool ran = false;
  sluice::Security security;
  sluice::ResumePolicy resume;
  std::uint64_t next_seq = 0;
  int resumes = 0;

  std::optional<sluice::Summary> summary;
  std::string session_id, session_token;
  std::string error_message, error_field, error_description;
  int grpc_code = 0;

  FlatProgress progress_flat;          // for the progress callback
  FlatProgress summary_progress_flat;  // for sluice_session_summary
  std::vector<double> summary_mean, summary_sd;
  std::vector<int64_t> summary_count;

  void set_error(int grpc, std::string msg, std::string field = "", std::string desc = "") {
    grpc_code = grpc;
    error_message = std::move(msg);
    error_field = std::move(field);
    error_description = std::move(desc);
  }
};

extern "C" {

void sluice_spec_defaults(sluice_spec* spec) {
  if (spec == nullptr) return;
  *spec = sluice_spec{};
  spec->start_rows = 1;
}

sluice_session* sluice_session_new(const sluice_spec* in, sluice_evaluate_fn evaluate, void* user_data) {
  try {
    auto* s = new sluice_session;
    s->evaluate = evaluate;
    s->evaluate_data = user_data;
    if (in == nullptr) {
      s->usage_error = "sluice_session_new: NULL spec";
      return s;
    }
    sluice::Spec& sp = s->spec;
    sp.dim = in->dim;
    sp.chains = in->chains;
    if (in->kernel != nullptr) sp.kernel = in->kernel;
    sp.names = split_names(in->names);
    const long rows = in->start_rows > 0 ? in->start_rows : 1;
    if (in->start == nullptr) {
      s->usage_error = "sluice_session_new: spec.start is NULL (give start_rows x dim values)";
    } else if (in->dim < 1 || in->start_rows < 0) {
      s->usage_error = "sluice_session_new: spec.dim must be >= 1 and spec.start_rows 1 or chains";
    } else {
      sp.start.assign(in->start, in->start + rows * in->dim);
    }
    sp.step = in->step;
    sp.burn_in = in->burn_in;
    sp.keep_every = in->keep_every;
    sp.draws_per_chain = in->draws_per_chain;
    sp.max_evaluations = in->max_evaluations;
    sp.max_seconds = in->max_seconds;
    sp.progress_every_steps = in->progress_every_steps;
    sp.progress_interval_seconds = in->progress_interval_seconds;
    sp.seed = in->seed;
    sp.max_message_bytes = in->max_message_bytes;
    if (in->curvature_declared != 0) {
      sluice::Curvature c;
      c.strong_convexity = in->strong_convexity;
      c.smoothness = in->smoothness;
      c.start_distance = in->start_distance;
      c.second_moment = in->second_moment;
      sp.curvature = c;
    }
    sp.wants.min_bulk_ess = in->want_min_bulk_ess;
    sp.wants.min_tail_ess = in->want_min_tail_ess;
    sp.wants.max_rhat = in->want_max_rhat;
    sp.wants.max_ksd = in->want_max_ksd;
    sp.wants.eps = in->want_eps;
    sp.wants.metric = in->want_metric == SLUICE_METRIC_TV   ? sluice::Metric::TV
                      : in->want_metric == SLUICE_METRIC_W2 ? sluice::Metric::W2
                                                            : sluice::Metric::Default;
    sp.friction = in->friction;
    sp.inverse_mass = in->inverse_mass;
    sp.krylov_tolerance = in->krylov_tolerance;
    sp.krylov_max_iterations = in->krylov_max_iterations;
    sp.slice_width = in->slice_width;
    sp.slice_max_expansions = in->slice_max_expansions;
    sp.curvature_probe_iterations = in->curvature_probe_iterations;
    if (in->noise_declared != 0) {
      sluice::Noise n;
      n.variance = in->noise_variance;
      n.bias = in->noise_bias;
      n.data_size = in->noise_data_size;
      n.minibatch_size = in->noise_minibatch_size;
      n.replicates = in->noise_replicates;
      sp.noise = n;
    }
    if (in->schedule_declared != 0) sp.schedule = sluice::Schedule{in->schedule_a, in->schedule_b, in->schedule_gamma};
    sp.anchor_every = in->anchor_every;
    sp.fixed_point_tolerance = in->fixed_point_tolerance;
    sp.fixed_point_iterations = in->fixed_point_iterations;
    if (in->envelope_declared != 0) {
      sluice::Envelope e;
      if (in->envelope_mean == nullptr) {
        if (s->usage_error.empty()) s->usage_error = "sluice_session_new: spec.envelope_mean is NULL (give dim values)";
      } else if (in->dim >= 1) {
        e.mean.assign(in->envelope_mean, in->envelope_mean + in->dim);
      }
      e.scale = in->envelope_scale;
      e.log_bound = in->envelope_log_bound;
      sp.envelope = e;
    }
    return s;
  } catch (...) {
    return nullptr;
  }
}

void sluice_session_on_draws(sluice_session* s, sluice_draws_fn fn, void* user_data) {
  if (s == nullptr) return;
  s->on_draws = fn;
  s->draws_data = user_data;
}

void sluice_session_on_progress(sluice_session* s, sluice_progress_fn fn, void* user_data) {
  if (s == nullptr) return;
  s->on_progress = fn;
  s->progress_data = user_data;
}

int sluice_session_set_tls(sluice_session* s, const char* ca_file, const char* cert_file, const char* key_file) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  try {
    const bool cert = cert_file != nullptr && *cert_file != '\0', key = key_file != nullptr && *key_file != '\0';
    if (cert != key) {
      s->set_error(0, "sluice_session_set_tls: a client certificate needs its key, and a key its certificate");
      return SLUICE_ERR_USAGE;
    }
    s->security.tls = true;
    s->security.ca_file = ca_file != nullptr ? ca_file : "";
    s->security.cert_file = cert ? cert_file : "";
    s->security.key_file = key ? key_file : "";
    return SLUICE_OK;
  } catch (...) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  }
}

int sluice_session_set_token(sluice_session* s, const char* token) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  try {
    s->security.token = token != nullptr ? token : "";
    s->security.token_file.clear();
    return SLUICE_OK;
  } catch (...) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  }
}

int sluice_session_set_token_file(sluice_session* s, const char* path) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  try {
    s->security.token_file = path != nullptr ? path : "";
    s->security.token.clear();
    return SLUICE_OK;
  } catch (...) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  }
}

int sluice_session_set_insecure(sluice_session* s, int insecure) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  s->security.insecure = insecure != 0;
  return SLUICE_OK;
}

int sluice_session_set_resume(sluice_session* s, int attempts, double first_wait_seconds, double max_wait_seconds) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  // NaN fails every comparison: check that the waits are numbers.
  if (!(first_wait_seconds >= 0) || !(max_wait_seconds >= 0) || first_wait_seconds > 3600 ||
      max_wait_seconds > 3600) {
    s->set_error(0, "sluice_session_set_resume: first_wait_seconds and max_wait_seconds must be in [0, 3600]");
    return SLUICE_ERR_USAGE;
  }
  s->resume.attempts = attempts;
  s->resume.first_wait = first_wait_seconds;
  s->resume.max_wait = max_wait_seconds;
  return SLUICE_OK;
}

}  // extern "C"

namespace {

// ResumeFrom names the session sluice_session_resume continues.
struct ResumeFrom {
  std::string session_id, session_token;
  std::uint64_t next_seq = 0;
};

// run_session is sluice_session_run (resume null, messages name fn) and
// sluice_session_resume.
int run_session(sluice_session* s, const char* target, const char* fn, const ResumeFrom* resume) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  try {
    if (s->ran) {
      s->set_error(0, std::string(fn) + ": this session has already run");
      return SLUICE_ERR_STATE;
    }
    s->set_error(0, "");
    if (resume == nullptr && !s->usage_error.empty()) {
      s->set_error(0, s->usage_error);
      return SLUICE_ERR_USAGE;
    }
    if (target == nullptr || *target == '\0') {
      s->set_error(0, std::string(fn) + ": no target (want \"host:port\")");
      return SLUICE_ERR_USAGE;
    }
    if (s->evaluate == nullptr) {
      s->set_error(0, std::string(fn) + ": no evaluation callback");
      return SLUICE_ERR_USAGE;
    }
    s->ran = true;
    s->next_seq = resume != nullptr ? resume->next_seq : 0;

    sluice::Callbacks cb;
    cb.on_registered = [s](const sluice::Registered& r) {
      s->session_id = r.session_id;
      s->session_token = r.resume_token;
    };
    cb.on_draws = [s](const sluice::Draws& d) {
      s->next_seq = d.seq + static_cast<std::uint64_t>(d.rows);
      if (s->on_draws == nullptr) return;
      sluice_draws cd{d.seq, d.rows, d.dim, d.values, d.chains, d.iterations};
      s->on_draws(&cd, s->draws_data);
    };
    if (s->on_progress != nullptr) {
      cb.on_progress = [s](const sluice::Progress& p) {
        sluice_progress cp;
        s->progress_flat.fill(p, &cp);
        s->on_progress(&cp, s->progress_data);
      };
    }
    auto evaluate = [s](sluice::Batch& b) {
      sluice_batch cb{};
      cb.rows = b.rows;
      cb.dim = b.dim;
      cb.want_gradient = b.want_gradient;
      cb.want_log_density = b.want_log_density;
      cb.want_hessian = b.want_hessian;
      cb.want_hessian_vector = b.want_hessian_vector;
      cb.replicates = b.replicates;
      cb.full_data = b.full_data;
      cb.points = b.points;
      cb.chains = b.chains;
      cb.groups = b.groups;
      cb.vectors = b.vectors;
      cb.gradients = b.gradients;
      cb.log_densities = b.log_densities;
      cb.hessians = b.hessians;
      cb.hessian_vectors = b.hessian_vectors;
      const int rc = s->evaluate(&cb, s->evaluate_data);
      if (rc != 0) throw std::runtime_error("evaluation callback returned " + std::to_string(rc));
    };

    try {
      auto channel = sluice::connect(target, s->security, s->spec.max_message_bytes);
      if (resume != nullptr) {
        s->summary =
            sluice::resume(channel, resume->session_id, resume->session_token, resume->next_seq, evaluate, cb, s->resume);
      } else {
        s->summary = sluice::run(channel, s->spec, evaluate, cb, s->resume);
      }
      s->resumes = s->summary->resumes;
      return SLUICE_OK;
    } catch (const sluice::Error& e) {
      if (e.summary) s->summary = e.summary;
      if (e.summary) s->resumes = e.summary->resumes;
      s->set_error(e.grpc_code, e.message, e.field, e.description);
      return static_cast<int>(e.code);
    }
  } catch (const std::bad_alloc&) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  } catch (const std::exception& e) {
    s->set_error(0, std::string("sluice: ") + e.what());
    return SLUICE_ERR_PROTOCOL;
  } catch (...) {
    s->set_error(0, "sluice: unknown failure");
    return SLUICE_ERR_PROTOCOL;
  }
}

}  // namespace

extern "C" {

int sluice_session_run(sluice_session* s, const char* target) {
  return run_session(s, target, "sluice_session_run", nullptr);
}

int sluice_session_resume(sluice_session* s, const char* target, const char* session_id, const char* session_token,
                          uint64_t next_seq) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  if (s->ran) {
    s->set_error(0, "sluice_session_resume: this session has already run");
    return SLUICE_ERR_STATE;
  }
  if (session_id == nullptr || *session_id == '\0') {
    s->set_error(0, "sluice_session_resume: no session id");
    return SLUICE_ERR_USAGE;
  }
  if (session_token == nullptr || *session_token == '\0') {
    s->set_error(0,
                 "sluice_session_resume: no session token (sluice_session_token of the session resumed, "
                 "not the server's bearer token)");
    return SLUICE_ERR_USAGE;
  }
  try {
    ResumeFrom from{session_id, session_token, next_seq};
    return run_session(s, target, "sluice_session_resume", &from);
  } catch (const std::bad_alloc&) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  }
}

int sluice_session_follow(sluice_session* s, const char* target, const char* session_id, const char* session_token,
                          uint64_t from_seq) {
  if (s == nullptr) return SLUICE_ERR_USAGE;
  try {
    if (s->ran) {
      s->set_error(0, "sluice_session_follow: this handle has already run");
      return SLUICE_ERR_STATE;
    }
    s->set_error(0, "");
    if (target == nullptr || *target == '\0') {
      s->set_error(0, "sluice_session_follow: no target (want \"host:port\")");
      return SLUICE_ERR_USAGE;
    }
    if (session_id == nullptr || *session_id == '\0') {
      s->set_error(0, "sluice_session_follow: no session id");
      return SLUICE_ERR_USAGE;
    }
    if (session_token == nullptr || *session_token == '\0') {
      s->set_error(0,
                   "sluice_session_follow: no session token (sluice_session_token of the session followed, "
                   "not the server's bearer token)");
      return SLUICE_ERR_USAGE;
    }
    s->ran = true;
    s->next_seq = from_seq;
    std::function<void(const sluice::Draws&)> on_draws = [s](const sluice::Draws& d) {
      s->next_seq = d.seq + static_cast<std::uint64_t>(d.rows);
      if (s->on_draws == nullptr) return;
      sluice_draws cd{d.seq, d.rows, d.dim, d.values, d.chains, d.iterations};
      s->on_draws(&cd, s->draws_data);
    };
    try {
      auto channel = sluice::connect(target, s->security, sluice::kFollowMaxMessageBytes);
      s->summary = sluice::follow(channel, session_id, session_token, from_seq, on_draws, s->resume);
      s->resumes = s->summary->resumes;
      return SLUICE_OK;
    } catch (const sluice::Error& e) {
      if (e.summary) s->resumes = e.summary->resumes;
      if (e.summary && e.summary->reason != sluice::Reason::None) s->summary = e.summary;
      s->set_error(e.grpc_code, e.message, e.field, e.description);
      return static_cast<int>(e.code);
    }
  } catch (const std::bad_alloc&) {
    s->set_error(0, "sluice: out of memory");
    return SLUICE_ERR_USAGE;
  } catch (const std::exception& e) {
    s->set_error(0, std::string("sluice: ") + e.what());
    return SLUICE_ERR_PROTOCOL;
  } catch (...) {
    s->set_error(0, "sluice: unknown failure");
    return SLUICE_ERR_PROTOCOL;
  }
}

uint64_t sluice_session_next_seq(const sluice_session* s) { return s == nullptr ? 0 : s->next_seq; }

int sluice_session_resumes(const sluice_session* s) { return s == nullptr ? 0 : s->resumes; }

int sluice_session_summary(const sluice_session* cs, sluice_summary* out) {
  if (cs == nullptr || out == nullptr) return SLUICE_ERR_USAGE;
  auto* s = const_cast<sluice_session*>(cs);  // the flat arrays are caches
  if (!s->summary) return SLUICE_ERR_STATE;
  const sluice::Summary& sum = *s->summary;
  s->summary_mean.clear();
  s->summary_sd.clear();
  s->summary_count.clear();
  for (const auto& p : sum.parameters) {
    s->summary_mean.push_back(p.mean);
    s->summary_sd.push_back(p.sd);
    s->summary_count.push_back(p.count);
  }
  *out = sluice_summary{};
  out->reason = static_cast<int32_t>(sum.reason);
  out->dim = static_cast<int32_t>(sum.parameters.size());
  out->draws_received = sum.draws_received;
  out->seed = sum.registered.seed;
  out->step = sum.registered.step;
  out->mean = s->summary_mean.data();
  out->sd = s->summary_sd.data();
  out->count = s->summary_count.data();
  s->summary_progress_flat.fill(sum.progress, &out->progress);
  return SLUICE_OK;
}

const char* sluice_session_error_message(const sluice_session* s) {
  return s == nullptr ? "NULL session" : s->error_message.c_str();
}

const char* sluice_session_error_field(const sluice_session* s) {
  return s == nullptr ? "" : s->error_field.c_str();
}

const char* sluice_session_error_description(const sluice_session* s) {
  return s == nullptr ? "" : s->error_description.c_str();
}

int sluice_session_grpc_code(const sluice_session* s) { return s == nullptr ? 0 : s->grpc_code; }

const char* sluice_session_id(const sluice_session* s) { return s == nullptr ? "" : s->session_id.c_str(); }

const char* sluice_session_token(const sluice_session* s) { return s == nullptr ? "" : s->session_token.c_str(); }

void sluice_session_free(sluice_session* s) { delete s; }

int sluice_check_layout(int64_t spec, int64_t batch, int64_t draws, int64_t progress, int64_t summary,
                        const char** message) {
  struct {
    const char* what;
    int64_t got, want;
  } const sizes[] = {
      {"sluice_spec size differs from the library's", spec, sizeof(sluice_spec)},
      {"sluice_batch size differs from the library's", batch, sizeof(sluice_batch)},
      {"sluice_draws size differs from the library's", draws, sizeof(sluice_draws)},
      {"sluice_progress size differs from the library's", progress, sizeof(sluice_progress)},
      {"sluice_summary size differs from the library's", summary, sizeof(sluice_summary)},
  };
  for (const auto& c : sizes) {
    if (c.got != c.want) {
      if (message != nullptr) *message = c.what;
      return SLUICE_ERR_USAGE;
    }
  }
  if (message != nullptr) *message = "";
  return SLUICE_OK;
}

const char* sluice_error_name(int code) {
  switch (code) {
    case SLUICE_OK:
      return "SLUICE_OK";
    case SLUICE_ERR_INVALID_ARGUMENT:
      return "SLUICE_ERR_INVALID_ARGUMENT";
    case SLUICE_ERR_RESOURCE_EXHAUSTED:
      return "SLUICE_ERR_RESOURCE_EXHAUSTED";
    case SLUICE_ERR_DEADLINE_EXCEEDED:
      return "SLUICE_ERR_DEADLINE_EXCEEDED";
    case SLUICE_ERR_UNAVAILABLE:
      return "SLUICE_ERR_UNAVAILABLE";
    case SLUICE_ERR_CANCELLED:
      return "SLUICE_ERR_CANCELLED";
    case SLUICE_ERR_SERVER:
      return "SLUICE_ERR_SERVER";
    case SLUICE_ERR_EVALUATOR:
      return "SLUICE_ERR_EVALUATOR";
    case SLUICE_ERR_PROTOCOL:
      return "SLUICE_ERR_PROTOCOL";
    case SLUICE_ERR_USAGE:
      return "SLUICE_ERR_USAGE";
    case SLUICE_ERR_STATE:
      return "SLUICE_ERR_STATE";
    case SLUICE_ERR_UNAUTHENTICATED:
      return "SLUICE_ERR_UNAUTHENTICATED";
    default:
      return "SLUICE_ERR_UNKNOWN";
  }
}

const char* sluice_reason_name(int reason) {
  return sluice::reason_name(static_cast<sluice::Reason>(reason));
}

}  // extern "C"
