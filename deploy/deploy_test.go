package deploy

import (
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	appsv1 "k8s.io/api/apps/v1"
	batchv1 "k8s.io/api/batch/v1"
	corev1 "k8s.io/api/core/v1"
	"sigs.k8s.io/yaml"
)

// manifestDir holds the Kubernetes manifests, one or more objects per file.
const manifestDir = "kubernetes"

// manifests is every object of every manifest, decoded strictly.
type manifests struct {
	deployments []*appsv1.Deployment
	services    []*corev1.Service
	claims      []*corev1.PersistentVolumeClaim
	jobs        []*batchv1.Job
}

// splitDocuments splits a YAML stream at its "---" separator lines and
// drops documents that hold only comments or blanks.
func splitDocuments(data []byte) [][]byte {
	var docs [][]byte
	var cur bytes.Buffer
	flush := func() {
		if hasContent(cur.Bytes()) {
			docs = append(docs, slices.Clone(cur.Bytes()))
		}
		cur.Reset()
	}
	for line := range strings.Lines(string(data)) {
		if strings.TrimRight(line, " \t\r\n") == "---" {
			flush()
			continue
		}
		cur.WriteString(line)
	}
	flush()
	return docs
}

func hasContent(doc []byte) bool {
	for line := range strings.Lines(string(doc)) {
		if t := strings.TrimSpace(line); t != "" && !strings.HasPrefix(t, "#") {
			return true
		}
	}
	return false
}

// decodeStrict decodes one document into the API type its apiVersion and
// kind name; an unknown field, a duplicate field or an unknown kind is an
// error.
func decodeStrict(doc []byte, m *manifests) (string, error) {
	var head struct {
		APIVersion string `json:"apiVersion"`
		Kind       string `json:"kind"`
	}
	if err := yaml.Unmarshal(doc, &head); err != nil {
		return "", err
	}
	into := func(obj any) error { return yaml.UnmarshalStrict(doc, obj) }
	var err error
	switch head.APIVersion + " " + head.Kind {
	case "apps/v1 Deployment":
		d := new(appsv1.Deployment)
		err = into(d)
		m.deployments = append(m.deployments, d)
	case "v1 Service":
		s := new(corev1.Service)
		err = into(s)
		m.services = append(m.services, s)
	case "v1 PersistentVolumeClaim":
		c := new(corev1.PersistentVolumeClaim)
		err = into(c)
		m.claims = append(m.claims, c)
	case "batch/v1 Job":
		j := new(batchv1.Job)
		err = into(j)
		m.jobs = append(m.jobs, j)
	default:
		return "", fmt.Errorf("apiVersion %q kind %q: not a kind these tests know", head.APIVersion, head.Kind)
	}
	return head.Kind, err
}

func loadManifests(t *testing.T) *manifests {
	t.Helper()
	files, err := filepath.Glob(filepath.Join(manifestDir, "*.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if len(files) == 0 {
		t.Fatalf("no manifests in %s", manifestDir)
	}
	m := &manifests{}
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		docs := splitDocuments(data)
		if len(docs) == 0 {
			t.Errorf("%s: no object", f)
		}
		for i, doc := range docs {
			if _, err := decodeStrict(doc, m); err != nil {
				t.Errorf("%s, document %d: %v", f, i+1, err)
			}
		}
	}
	if t.Failed() {
		t.FailNow()
	}
	return m
}

// TestStrictDecodingCatchesMisspelling shows that the decoding the other
// tests rely on refuses a misspelt field and a field at the wrong level,
// which a lenient decoder would drop silently.
func TestStrictDecodingCatchesMisspelling(t *testing.T) {
	data, err := os.ReadFile(filepath.Join(manifestDir, "server-deployment.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ from, to string }{
		{"  replicas: 1\n", "  replicas: 1\n  replica: 1\n"},
		{"          readinessProbe:\n", "          readinessProbes:\n"},
		{"              port: 7071\n              service: sluice.v1.SluiceService\n", "              port: 7071\n              services: sluice.v1.SluiceService\n"},
	} {
		if !bytes.Contains(data, []byte(c.from)) {
			t.Fatalf("server-deployment.yaml no longer contains %q: update this test", c.from)
		}
		bad := bytes.Replace(data, []byte(c.from), []byte(c.to), 1)
		var m manifests
		for _, doc := range splitDocuments(bad) {
			if _, err := decodeStrict(doc, &m); err == nil {
				t.Errorf("%q accepted", strings.TrimSpace(c.to))
			} else if !strings.Contains(err.Error(), "unknown field") {
				t.Errorf("%q: error %v, want an unknown-field error", strings.TrimSpace(c.to), err)
			}
		}
	}
}

func TestManifestsDecodeStrictly(t *testing.T) {
	m := loadManifests(t)
	if len(m.deployments) != 1 || len(m.services) != 1 || len(m.claims) != 1 || len(m.jobs) != 1 {
		t.Fatalf("got %d deployments, %d services, %d claims, %d jobs; want one of each",
			len(m.deployments), len(m.services), len(m.claims), len(m.jobs))
	}
}

// containerPort returns the port of c with that number, or nil.
func containerPort(c *corev1.Container, port int32) *corev1.ContainerPort {
	for i := range c.Ports {
		if c.Ports[i].ContainerPort == port {
			return &c.Ports[i]
		}
	}
	return nil
}

// checkImage requires an explicit tag or digest other than "latest".
func checkImage(t *testing.T, where, image string) {
	t.Helper()
	if image == "" {
		t.Errorf("%s: no image", where)
		return
	}
	if strings.Contains(image, "@sha256:") {
		return
	}
	name := image[strings.LastIndex(image, "/")+1:]
	_, tag, ok := strings.Cut(name, ":")
	switch {
	case !ok || tag == "":
		t.Errorf("%s: image %q has no tag (an implicit latest)", where, image)
	case tag == "latest":
		t.Errorf("%s: image %q uses the latest tag", where, image)
	}
}

// checkContainer checks what every container must have: an image with a
// fixed tag, requests and limits for cpu and memory, mounts of declared
// volumes, and no privilege escalation.
func checkContainer(t *testing.T, where string, c *corev1.Container, volumes []corev1.Volume) {
	t.Helper()
	checkImage(t, where, c.Image)
	for _, res := range []corev1.ResourceName{corev1.ResourceCPU, corev1.ResourceMemory} {
		if _, ok := c.Resources.Requests[res]; !ok {
			t.Errorf("%s: no %s request", where, res)
		}
		if _, ok := c.Resources.Limits[res]; !ok {
			t.Errorf("%s: no %s limit", where, res)
		}
	}
	for _, vm := range c.VolumeMounts {
		if !slices.ContainsFunc(volumes, func(v corev1.Volume) bool { return v.Name == vm.Name }) {
			t.Errorf("%s: mount %q of an undeclared volume", where, vm.Name)
		}
	}
	if sc := c.SecurityContext; sc == nil || sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation {
		t.Errorf("%s: allowPrivilegeEscalation must be false", where)
	}
}

// selects reports whether every label of selector is in labels.
func selects(selector, labels map[string]string) bool {
	if len(selector) == 0 {
		return false
	}
	for k, v := range selector {
		if labels[k] != v {
			return false
		}
	}
	return true
}

// flagValue returns the value of --name=value or --name value in args.
func flagValue(args []string, name string) (string, bool) {
	for i, a := range args {
		if v, ok := strings.CutPrefix(a, "--"+name+"="); ok {
			return v, true
		}
		if a == "--"+name && i+1 < len(args) {
			return args[i+1], true
		}
	}
	return "", false
}

// mountedUnder returns the mount of c whose path holds file, or nil.
func mountedUnder(c *corev1.Container, file string) *corev1.VolumeMount {
	for i := range c.VolumeMounts {
		if strings.HasPrefix(file, strings.TrimSuffix(c.VolumeMounts[i].MountPath, "/")+"/") {
			return &c.VolumeMounts[i]
		}
	}
	return nil
}

func volumeNamed(vols []corev1.Volume, name string) *corev1.Volume {
	for i := range vols {
		if vols[i].Name == name {
			return &vols[i]
		}
	}
	return nil
}

func TestServerDeployment(t *testing.T) {
	m := loadManifests(t)
	d := m.deployments[0]
	pod := &d.Spec.Template.Spec
	if d.Spec.Selector == nil || !selects(d.Spec.Selector.MatchLabels, d.Spec.Template.Labels) {
		t.Errorf("deployment selector %v does not select its pod labels %v", d.Spec.Selector, d.Spec.Template.Labels)
	}
	if d.Spec.Selector != nil && len(d.Spec.Selector.MatchExpressions) > 0 {
		t.Errorf("deployment selector uses matchExpressions, which these tests do not check")
	}
	// One writer of the state volume: one replica, never two during an update.
	if d.Spec.Replicas == nil || *d.Spec.Replicas != 1 {
		t.Errorf("replicas %v, want 1 (ReadWriteOnce state volume)", d.Spec.Replicas)
	}
	if d.Spec.Strategy.Type != appsv1.RecreateDeploymentStrategyType {
		t.Errorf("strategy %q, want Recreate", d.Spec.Strategy.Type)
	}
	if len(pod.Containers) != 1 {
		t.Fatalf("%d containers, want 1", len(pod.Containers))
	}
	c := &pod.Containers[0]
	checkContainer(t, "server", c, pod.Volumes)

	// Probes: gRPC health probes on a port the container declares, and not
	// the TLS port (the kubelet's gRPC probe speaks plaintext only).
	tlsPort := int32(0)
	if addr, ok := flagValue(c.Args, "addr"); ok {
		fmt.Sscanf(addr[strings.LastIndex(addr, ":")+1:], "%d", &tlsPort)
	}
	if containerPort(c, tlsPort) == nil {
		t.Errorf("--addr port %d is not a container port", tlsPort)
	}
	for name, p := range map[string]*corev1.Probe{"startup": c.StartupProbe, "readiness": c.ReadinessProbe, "liveness": c.LivenessProbe} {
		switch {
		case p == nil:
			t.Errorf("no %s probe", name)
		case p.GRPC == nil:
			t.Errorf("%s probe is not a grpc probe", name)
		case containerPort(c, p.GRPC.Port) == nil:
			t.Errorf("%s probe port %d is not a container port", name, p.GRPC.Port)
		case p.GRPC.Port == tlsPort:
			t.Errorf("%s probe on the TLS port %d", name, p.GRPC.Port)
		}
	}
	if health, ok := flagValue(c.Args, "health-addr"); !ok || c.ReadinessProbe == nil || c.ReadinessProbe.GRPC == nil ||
		!strings.HasSuffix(health, fmt.Sprintf(":%d", c.ReadinessProbe.GRPC.Port)) {
		t.Errorf("--health-addr %q does not match the probe port", health)
	}
	// The readiness probe asks for the sampling service by its health name
	// (server.ServiceName).
	if p := c.ReadinessProbe; p != nil && p.GRPC != nil && (p.GRPC.Service == nil || *p.GRPC.Service != "sluice.v1.SluiceService") {
		t.Errorf("readiness probe service %v, want sluice.v1.SluiceService", p.GRPC.Service)
	}

	// The state directory is the claimed volume; the TLS files and the
	// token come from Secrets mounted read-only.
	state, ok := flagValue(c.Args, "state-dir")
	if !ok {
		t.Fatal("no --state-dir")
	}
	var stateMount *corev1.VolumeMount
	for i := range c.VolumeMounts {
		if c.VolumeMounts[i].MountPath == state {
			stateMount = &c.VolumeMounts[i]
		}
	}
	if stateMount == nil {
		t.Errorf("--state-dir %s is not a mount path", state)
	} else if v := volumeNamed(pod.Volumes, stateMount.Name); v == nil || v.PersistentVolumeClaim == nil ||
		v.PersistentVolumeClaim.ClaimName != m.claims[0].Name {
		t.Errorf("--state-dir volume %q is not the claim %q", stateMount.Name, m.claims[0].Name)
	}
	if modes := m.claims[0].Spec.AccessModes; !slices.Equal(modes, []corev1.PersistentVolumeAccessMode{corev1.ReadWriteOnce}) {
		t.Errorf("state claim access modes %v, want [ReadWriteOnce]", modes)
	}
	for _, flag := range []string{"tls-cert", "tls-key", "token-file"} {
		file, ok := flagValue(c.Args, flag)
		if !ok {
			t.Errorf("no --%s", flag)
			continue
		}
		vm := mountedUnder(c, file)
		if vm == nil {
			t.Errorf("--%s %s is under no mount", flag, file)
			continue
		}
		if !vm.ReadOnly {
			t.Errorf("--%s mount %q is writable", flag, vm.Name)
		}
		if v := volumeNamed(pod.Volumes, vm.Name); v == nil || v.Secret == nil {
			t.Errorf("--%s comes from volume %q, which is not a Secret", flag, vm.Name)
		}
	}
	if g, ok := flagValue(c.Args, "grace"); ok && pod.TerminationGracePeriodSeconds != nil {
		var secs int64
		fmt.Sscanf(g, "%ds", &secs)
		if secs <= 0 || *pod.TerminationGracePeriodSeconds <= secs {
			t.Errorf("terminationGracePeriodSeconds %d is not longer than --grace %s", *pod.TerminationGracePeriodSeconds, g)
		}
	}
}

func TestServerService(t *testing.T) {
	m := loadManifests(t)
	s, d := m.services[0], m.deployments[0]
	if !selects(s.Spec.Selector, d.Spec.Template.Labels) {
		t.Errorf("service selector %v does not select the server pods %v", s.Spec.Selector, d.Spec.Template.Labels)
	}
	c := &d.Spec.Template.Spec.Containers[0]
	for _, p := range s.Spec.Ports {
		var target *corev1.ContainerPort
		if name := p.TargetPort.StrVal; name != "" {
			for i := range c.Ports {
				if c.Ports[i].Name == name {
					target = &c.Ports[i]
				}
			}
		} else {
			target = containerPort(c, p.TargetPort.IntVal)
		}
		if target == nil {
			t.Errorf("service port %q targets %v, which the server container does not declare", p.Name, p.TargetPort.String())
			continue
		}
		if addr, _ := flagValue(c.Args, "addr"); !strings.HasSuffix(addr, fmt.Sprintf(":%d", target.ContainerPort)) {
			t.Errorf("service port %q reaches container port %d, not the --addr port (%s)", p.Name, target.ContainerPort, addr)
		}
	}
}

func TestWorkerJob(t *testing.T) {
	m := loadManifests(t)
	j := m.jobs[0]
	pod := &j.Spec.Template.Spec
	if j.Spec.Parallelism == nil || *j.Spec.Parallelism < 1 || j.Spec.Completions == nil || *j.Spec.Completions < *j.Spec.Parallelism {
		t.Errorf("parallelism %v, completions %v: want 1 <= parallelism <= completions", j.Spec.Parallelism, j.Spec.Completions)
	}
	if j.Spec.CompletionMode == nil || *j.Spec.CompletionMode != batchv1.IndexedCompletion {
		t.Errorf("completionMode %v, want Indexed (each worker knows its index)", j.Spec.CompletionMode)
	}
	if pod.RestartPolicy != corev1.RestartPolicyNever && pod.RestartPolicy != corev1.RestartPolicyOnFailure {
		t.Errorf("restartPolicy %q: a Job's pods need Never or OnFailure", pod.RestartPolicy)
	}
	if len(pod.Containers) != 1 {
		t.Fatalf("%d containers, want 1", len(pod.Containers))
	}
	c := &pod.Containers[0]
	checkContainer(t, "worker", c, pod.Volumes)
	env := map[string]corev1.EnvVar{}
	for _, e := range c.Env {
		env[e.Name] = e
	}
	svc := m.services[0]
	if e, ok := env["SLUICE_TARGET"]; !ok || e.Value != fmt.Sprintf("%s:%d", svc.Name, svc.Spec.Ports[0].Port) {
		t.Errorf("SLUICE_TARGET %q, want the service %s:%d", e.Value, svc.Name, svc.Spec.Ports[0].Port)
	}
	if e, ok := env["SLUICE_SESSION_ID"]; !ok || e.Value == "" {
		t.Error("no SLUICE_SESSION_ID")
	}
	// The token comes from the same Secret the server reads its token from.
	serverToken := ""
	d := m.deployments[0]
	if file, ok := flagValue(d.Spec.Template.Spec.Containers[0].Args, "token-file"); ok {
		if vm := mountedUnder(&d.Spec.Template.Spec.Containers[0], file); vm != nil {
			if v := volumeNamed(d.Spec.Template.Spec.Volumes, vm.Name); v != nil && v.Secret != nil {
				serverToken = v.Secret.SecretName
			}
		}
	}
	if e, ok := env["SLUICE_TOKEN"]; !ok || e.Value != "" || e.ValueFrom == nil || e.ValueFrom.SecretKeyRef == nil ||
		e.ValueFrom.SecretKeyRef.Name != serverToken {
		t.Errorf("SLUICE_TOKEN must come from the Secret %q the server reads (got %+v)", serverToken, e)
	}
}

// TestReadmeNamesSecrets checks that deploy/README.md tells how to create
// every Secret the manifests mount or read.
func TestReadmeNamesSecrets(t *testing.T) {
	m := loadManifests(t)
	readme, err := os.ReadFile("README.md")
	if err != nil {
		t.Fatal(err)
	}
	secrets := map[string]bool{}
	pods := []*corev1.PodSpec{&m.deployments[0].Spec.Template.Spec, &m.jobs[0].Spec.Template.Spec}
	for _, pod := range pods {
		for _, v := range pod.Volumes {
			if v.Secret != nil {
				secrets[v.Secret.SecretName] = true
			}
		}
		for _, c := range pod.Containers {
			for _, e := range c.Env {
				if e.ValueFrom != nil && e.ValueFrom.SecretKeyRef != nil {
					secrets[e.ValueFrom.SecretKeyRef.Name] = true
				}
			}
		}
	}
	if len(secrets) == 0 {
		t.Fatal("no Secret found: the manifests changed, update this test")
	}
	for name := range secrets {
		if !bytes.Contains(readme, []byte("create secret")) || !bytes.Contains(readme, []byte(name)) {
			t.Errorf("README.md does not show how to create the Secret %q", name)
		}
	}
}
