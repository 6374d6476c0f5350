package client

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/metadata"

	sluicev1 "sluice/proto/sluice/v1"
)

// WorkOption adjusts Work.
type WorkOption func(*workConfig)

type workConfig struct {
	name     string
	callOpts []grpc.CallOption
}

// WorkerName sets the name the worker shows in the session's progress
// reports (default: the host name).
func WorkerName(name string) WorkOption { return func(c *workConfig) { c.name = name } }

// WorkCallOptions adds gRPC call options to the Attach call.
func WorkCallOptions(o ...grpc.CallOption) WorkOption {
	return func(c *workConfig) { c.callOpts = append(c.callOpts, o...) }
}

// Work attaches to a running session as one of its evaluators and
// answers the points the server gives it with eval, the same function a
// session's owner passes to Run, until the session ends. sessionID and
// token are Registered.SessionID and Registered.Token of the session. The
// server shares every request's rows among the session's evaluators by
// their measured speed and gives a worker's unanswered rows to others
// when it leaves, so workers may start and stop at any time.
//
// Work returns nil when the session ends, the evaluator's error when it
// fails (the worker then leaves; its rows go to others), and the server's
// status otherwise (NOT_FOUND for an unknown or finished session,
// PERMISSION_DENIED for a wrong token).
func Work(ctx context.Context, cc grpc.ClientConnInterface, sessionID, token string, eval Evaluator, opts ...WorkOption) error {
	cfg := workConfig{}
	for _, o := range opts {
		o(&cfg)
	}
	if cfg.name == "" {
		cfg.name, _ = os.Hostname()
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := sluicev1.NewSluiceServiceClient(cc).Attach(ctx, cfg.callOpts...)
	if err != nil {
		return err
	}
	if err := st.Send(&sluicev1.AttachRequest{Frame: &sluicev1.AttachRequest_Attach{Attach: &sluicev1.Attach{
		SessionId: sessionID, Token: token, Name: cfg.name}}}); err != nil {
		_, rerr := st.Recv()
		return attachStatus(rerr, err)
	}
	// The session's answer code (runner.answer) drives the worker through
	// a view of the Attach stream in session frames.
	r := &runner{eval: eval, stream: &workerStream{ClientStream: st, st: st}}
	for {
		f, err := st.Recv()
		if errors.Is(err, io.EOF) {
			return nil // the session ended
		}
		if err != nil {
			return err
		}
		p := f.GetPoints()
		if p == nil {
			continue // Attached
		}
		h, err := r.hold(p) // decodes the points answer reads
		if err != nil {
			return err
		}
		if err := r.answer(ctx, p, h); err != nil {
			if errors.Is(err, io.EOF) {
				_, rerr := st.Recv()
				return attachStatus(rerr, nil)
			}
			return err
		}
		if r.evalErr != nil {
			return r.evalErr
		}
	}
}

// attachStatus is the stream's status after a failed Send: Recv reports
// it; io.EOF means the server ended the call cleanly.
func attachStatus(recvErr, sendErr error) error {
	if recvErr == nil || errors.Is(recvErr, io.EOF) {
		return sendErr
	}
	return recvErr
}

// workerStream shows an Attach stream to runner.answer as a session
// stream: Evaluations go out as the worker's frames, and a Stop (the
// evaluator failed) is not sent at all: Work returns the evaluator's
// error and its rows go to other workers.
type workerStream struct {
	grpc.ClientStream
	st grpc.BidiStreamingClient[sluicev1.AttachRequest, sluicev1.AttachResponse]
}

func (w *workerStream) Send(m *sluicev1.SessionRequest) error {
	if ev := m.GetEvaluations(); ev != nil {
		return w.st.Send(&sluicev1.AttachRequest{Frame: &sluicev1.AttachRequest_Evaluations{Evaluations: ev}})
	}
	return nil
}

func (w *workerStream) Recv() (*sluicev1.SessionResponse, error) {
	return nil, errors.New("client: workerStream.Recv is not used")
}

func (w *workerStream) Header() (metadata.MD, error) { return w.st.Header() }

// The environment WorkFromEnv reads, as the project's Kubernetes worker
// Job and Slurm batch script set it.
const (
	// EnvTarget is the server's address ("host:port").
	EnvTarget = "SLUICE_TARGET"
	// EnvSessionID is the session to serve (Registered.SessionID).
	EnvSessionID = "SLUICE_SESSION_ID"
	// EnvToken is the session's token (Registered.Token).
	EnvToken = "SLUICE_TOKEN"
	// EnvTokenFile names a file holding the session's token, read when
	// EnvToken is empty.
	EnvTokenFile = "SLUICE_TOKEN_FILE"
	// EnvWorkerIndex is the worker's index in its array (Slurm's array
	// task id, the Job's completion index); it names the worker.
	EnvWorkerIndex = "SLUICE_WORKER_INDEX"
	// EnvCAFile names the authorities that sign the server's certificate;
	// set, the connection uses TLS.
	EnvCAFile = "SLUICE_CA_FILE"
	// EnvBearerToken is the server's own bearer token, for a server
	// started with a token file.
	EnvBearerToken = "SLUICE_BEARER_TOKEN"
)

// WorkFromEnv is Work for a worker started by a batch system: it dials
// $SLUICE_TARGET (TLS with $SLUICE_CA_FILE when set, else plain text,
// which Dial allows to loopback only unless the target is on a trusted
// network: see allowPlaintext), attaches to $SLUICE_SESSION_ID with
// $SLUICE_TOKEN (or the file $SLUICE_TOKEN_FILE) under the name
// "worker-$SLUICE_WORKER_INDEX@host", sends $SLUICE_BEARER_TOKEN when set,
// and works until the session ends.
func WorkFromEnv(ctx context.Context, eval Evaluator, allowPlaintext bool, opts ...WorkOption) error {
	target, id := os.Getenv(EnvTarget), os.Getenv(EnvSessionID)
	if target == "" || id == "" {
		return fmt.Errorf("client: %s and %s must be set", EnvTarget, EnvSessionID)
	}
	token := os.Getenv(EnvToken)
	if token == "" && os.Getenv(EnvTokenFile) != "" {
		b, err := os.ReadFile(os.Getenv(EnvTokenFile))
		if err != nil {
			return fmt.Errorf("client: %s: %w", EnvTokenFile, err)
		}
		token = strings.TrimSpace(string(b))
	}
	if token == "" {
		return fmt.Errorf("client: %s (or %s) must be set", EnvToken, EnvTokenFile)
	}
	var dopts []DialOption
	tlsOn := false
	if ca := os.Getenv(EnvCAFile); ca != "" {
		cfg, err := TLSFromFiles(ca, "", "")
		if err != nil {
			return err
		}
		dopts, tlsOn = append(dopts, WithTLS(cfg)), true
	} else if allowPlaintext {
		dopts = append(dopts, WithInsecure())
	}
	if b := os.Getenv(EnvBearerToken); b != "" {
		if tlsOn {
			dopts = append(dopts, WithGRPCOptions(WithToken(b)))
		} else {
			dopts = append(dopts, WithGRPCOptions(WithPlaintextToken(b)))
		}
	}
	cc, err := Dial(target, dopts...)
	if err != nil {
		return err
	}
	defer func() { _ = cc.Close() }()
	host, _ := os.Hostname()
	name := "worker@" + host
	if i := os.Getenv(EnvWorkerIndex); i != "" {
		name = "worker-" + i + "@" + host
	}
	return Work(ctx, cc, id, token, eval, append([]WorkOption{WorkerName(name)}, opts...)...)
}
