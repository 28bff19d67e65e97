package deploy

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	appsv1 "k8s.io/api/apps/v1"
	autoscalingv2 "k8s.io/api/autoscaling/v2"
	corev1 "k8s.io/api/core/v1"
	policyv1 "k8s.io/api/policy/v1"
	"k8s.io/apimachinery/pkg/api/resource"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"k8s.io/apimachinery/pkg/labels"
	"k8s.io/apimachinery/pkg/runtime"
	kjson "k8s.io/apimachinery/pkg/runtime/serializer/json"
	"k8s.io/apimachinery/pkg/util/intstr"
	k8syaml "k8s.io/apimachinery/pkg/util/yaml"
	sigsyaml "sigs.k8s.io/yaml"
)

// newObject returns an empty object of the Kubernetes API type that
// apiVersion and kind name, for the kinds stint's manifests use.
func newObject(apiVersion, kind string) (runtime.Object, bool) {
	switch apiVersion + " " + kind {
	case "apps/v1 Deployment":
		return &appsv1.Deployment{}, true
	case "v1 Service":
		return &corev1.Service{}, true
	case "v1 ConfigMap":
		return &corev1.ConfigMap{}, true
	case "v1 Secret":
		return &corev1.Secret{}, true
	case "v1 PersistentVolumeClaim":
		return &corev1.PersistentVolumeClaim{}, true
	case "policy/v1 PodDisruptionBudget":
		return &policyv1.PodDisruptionBudget{}, true
	case "autoscaling/v2 HorizontalPodAutoscaler":
		return &autoscalingv2.HorizontalPodAutoscaler{}, true
	}
	return nil, false
}

// decodeManifests splits multi-document YAML and decodes each document
// with apimachinery's strict serializer (unknown and duplicate fields are
// errors naming the field's path, as `kubectl apply --validate=strict`
// reports them) into the real API type for its apiVersion and kind.
func decodeManifests(src []byte) ([]runtime.Object, error) {
	scheme := runtime.NewScheme()
	for _, add := range []func(*runtime.Scheme) error{appsv1.AddToScheme, corev1.AddToScheme, policyv1.AddToScheme, autoscalingv2.AddToScheme} {
		if err := add(scheme); err != nil {
			return nil, err
		}
	}
	dec := kjson.NewSerializerWithOptions(kjson.DefaultMetaFactory, scheme, scheme, kjson.SerializerOptions{Yaml: true, Strict: true})
	r := k8syaml.NewYAMLReader(bufio.NewReader(bytes.NewReader(src)))
	var out []runtime.Object
	for n := 1; ; n++ {
		doc, err := r.Read()
		if errors.Is(err, io.EOF) {
			return out, nil
		}
		if err != nil {
			return nil, fmt.Errorf("document %d: %w", n, err)
		}
		var tm metav1.TypeMeta
		if err := sigsyaml.Unmarshal(doc, &tm); err != nil {
			return nil, fmt.Errorf("document %d: %w", n, err)
		}
		if tm.APIVersion == "" && tm.Kind == "" {
			if js, err := sigsyaml.YAMLToJSON(doc); err == nil && string(js) == "null" {
				continue // only comments
			}
			return nil, fmt.Errorf("document %d has no apiVersion and kind", n)
		}
		into, ok := newObject(tm.APIVersion, tm.Kind)
		if !ok {
			return nil, fmt.Errorf("document %d: %s %s is not a kind stint deploys", n, tm.APIVersion, tm.Kind)
		}
		obj, _, err := dec.Decode(doc, nil, into)
		if err != nil {
			return nil, fmt.Errorf("document %d (%s): %w", n, tm.Kind, err)
		}
		out = append(out, obj)
	}
}

// TestManifestDecodingIsStrict proves the decoder the manifests go through
// rejects what the API server would reject or silently drop.
func TestManifestDecodingIsStrict(t *testing.T) {
	const good = `apiVersion: apps/v1
kind: Deployment
metadata: {name: x}
spec:
  replicas: 2
  selector: {matchLabels: {app: x}}
  template:
    metadata: {labels: {app: x}}
    spec:
      containers:
        - name: x
          image: img
          readinessProbe: {httpGet: {path: /readyz, port: 8787}}
          resources: {requests: {cpu: 500m}}
`
	tests := []struct {
		name    string
		src     string
		wantErr string // "" for success
	}{
		{"valid", good, ""},
		{"comment-only document", "# nothing\n---\n" + good, ""},
		{"typo'd top-level spec field", strings.Replace(good, "replicas: 2", "replica: 2", 1), `unknown field "spec.replica"`},
		{"typo'd probe field", strings.Replace(good, "path: /readyz", "pth: /readyz", 1), `unknown field "spec.template.spec.containers[0].readinessProbe.httpGet.pth"`},
		{"duplicate field", strings.Replace(good, "replicas: 2", "replicas: 2\n  replicas: 3", 1), `"replicas" already set`},
		{"wrong type", strings.Replace(good, "replicas: 2", "replicas: two", 1), "cannot unmarshal"},
		{"bad quantity", strings.Replace(good, "cpu: 500m", "cpu: lots", 1), "quantities must match"},
		{"retired apiVersion", strings.Replace(good, "apps/v1", "extensions/v1beta1", 1), "not a kind stint deploys"},
		{"no kind", "metadata: {name: x}\n", "no apiVersion and kind"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			objs, err := decodeManifests([]byte(tc.src))
			if tc.wantErr == "" {
				require.Falsef(t, err != nil || len(objs) != 1, "got %d objects, %v; want 1 and no error", len(objs), err)
				return
			}
			require.Falsef(t, err == nil || !strings.Contains(err.Error(), tc.wantErr), "got %v, want an error containing %q", err, tc.wantErr)
		})
	}
}

// manifests is every object under k8s/, by kind and name.
type manifests struct {
	deployments map[string]*appsv1.Deployment
	services    map[string]*corev1.Service
	configMaps  map[string]*corev1.ConfigMap
	pvcs        map[string]*corev1.PersistentVolumeClaim
	pdbs        []*policyv1.PodDisruptionBudget
	hpas        []*autoscalingv2.HorizontalPodAutoscaler
	secrets     map[string]*corev1.Secret // from k8s/examples only
}

func loadManifests(t *testing.T) manifests {
	t.Helper()
	m := manifests{
		deployments: map[string]*appsv1.Deployment{}, services: map[string]*corev1.Service{},
		configMaps: map[string]*corev1.ConfigMap{}, pvcs: map[string]*corev1.PersistentVolumeClaim{},
		secrets: map[string]*corev1.Secret{},
	}
	files, _ := filepath.Glob("k8s/*.yaml")
	examples, _ := filepath.Glob("k8s/examples/*.yaml")
	require.False(t, len(files) == 0 || len(examples) == 0, "no manifests under k8s/ or k8s/examples/")
	for _, f := range append(files, examples...) {
		objs, err := decodeManifests(readFile(t, f))
		require.NoError(t, err, "%s", f)
		inExamples := strings.HasPrefix(f, "k8s/examples/")
		for _, o := range objs {
			switch v := o.(type) {
			case *appsv1.Deployment:
				m.deployments[v.Name] = v
			case *corev1.Service:
				m.services[v.Name] = v
			case *corev1.ConfigMap:
				m.configMaps[v.Name] = v
			case *corev1.PersistentVolumeClaim:
				m.pvcs[v.Name] = v
			case *policyv1.PodDisruptionBudget:
				m.pdbs = append(m.pdbs, v)
			case *autoscalingv2.HorizontalPodAutoscaler:
				m.hpas = append(m.hpas, v)
			case *corev1.Secret:
				assert.Truef(t, inExamples, "%s: Secret %s belongs under k8s/examples, out of `kubectl apply -f k8s/`", f, v.Name)
				m.secrets[v.Name] = v
			}
		}
	}
	return m
}

// k8sProxyConfig returns the stint config the proxy Deployment mounts.
func k8sProxyConfig(t *testing.T, m manifests) []byte {
	t.Helper()
	cm := m.configMaps["stint-config"]
	require.False(t, cm == nil || cm.Data["stint.yaml"] == "", "ConfigMap stint-config has no stint.yaml")
	return []byte(cm.Data["stint.yaml"])
}

func selects(t *testing.T, sel *metav1.LabelSelector, podLabels map[string]string) bool {
	t.Helper()
	s, err := metav1.LabelSelectorAsSelector(sel)
	require.NoError(t, err)
	return !s.Empty() && s.Matches(labels.Set(podLabels))
}

// containerPort resolves a probe's or Service's port (number or name).
func containerPort(c corev1.Container, p intstr.IntOrString) (int32, bool) {
	for _, cp := range c.Ports {
		if (p.Type == intstr.String && cp.Name == p.StrVal) || (p.Type == intstr.Int && cp.ContainerPort == p.IntVal) {
			return cp.ContainerPort, true
		}
	}
	return 0, false
}

// hardeningProblems lists what a pod template lacks of the security
// settings every stint pod keeps.
func hardeningProblems(spec corev1.PodSpec) []string {
	var p []string
	psc := spec.SecurityContext
	if psc == nil || psc.RunAsNonRoot == nil || !*psc.RunAsNonRoot {
		p = append(p, "pod securityContext.runAsNonRoot is not true")
	}
	if psc == nil || psc.RunAsUser == nil || *psc.RunAsUser == 0 {
		p = append(p, "pod securityContext.runAsUser is not a non-root uid")
	}
	if psc == nil || psc.SeccompProfile == nil || psc.SeccompProfile.Type != corev1.SeccompProfileTypeRuntimeDefault {
		p = append(p, "pod seccompProfile is not RuntimeDefault")
	}
	if spec.AutomountServiceAccountToken == nil || *spec.AutomountServiceAccountToken {
		p = append(p, "service account token is mounted")
	}
	for _, c := range spec.Containers {
		sc := c.SecurityContext
		switch {
		case sc == nil:
			p = append(p, c.Name+": no securityContext")
			continue
		case sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation:
			p = append(p, c.Name+": allowPrivilegeEscalation is not false")
		}
		if sc.ReadOnlyRootFilesystem == nil || !*sc.ReadOnlyRootFilesystem {
			p = append(p, c.Name+": readOnlyRootFilesystem is not true")
		}
		if sc.Privileged != nil && *sc.Privileged {
			p = append(p, c.Name+": privileged")
		}
		if sc.Capabilities == nil || !slices.Equal(sc.Capabilities.Drop, []corev1.Capability{"ALL"}) || len(sc.Capabilities.Add) > 0 {
			p = append(p, c.Name+": capabilities are not drop [ALL] with none added")
		}
		for _, r := range []corev1.ResourceName{corev1.ResourceCPU, corev1.ResourceMemory} {
			req, okReq := c.Resources.Requests[r]
			lim, okLim := c.Resources.Limits[r]
			if !okReq || !okLim || req.Cmp(lim) > 0 {
				p = append(p, fmt.Sprintf("%s: %s request and limit missing or request above limit", c.Name, r))
			}
		}
		for _, e := range c.Env {
			if secretName(e.Name) && e.Value != "" {
				p = append(p, fmt.Sprintf("%s: env %s has an inline value; use a secretKeyRef", c.Name, e.Name))
			}
		}
	}
	return p
}

// secretName reports whether an environment variable's name says it holds
// a secret.
func secretName(name string) bool {
	n := strings.ToUpper(name)
	for _, w := range []string{"KEY", "PASSWORD", "SECRET", "TOKEN"} {
		if strings.Contains(n, w) {
			return true
		}
	}
	return false
}

// TestHardeningChecksCatchGaps proves hardeningProblems fails pod specs
// that miss each setting.
func TestHardeningChecksCatchGaps(t *testing.T) {
	m := loadManifests(t)
	base := m.deployments["stint-proxy"]
	require.False(t, base == nil, "no Deployment stint-proxy")
	tests := []struct {
		name    string
		breakIt func(*corev1.PodSpec)
		want    string
	}{
		{"root allowed", func(s *corev1.PodSpec) { s.SecurityContext.RunAsNonRoot = nil }, "runAsNonRoot"},
		{"no seccomp", func(s *corev1.PodSpec) { s.SecurityContext.SeccompProfile = nil }, "seccompProfile"},
		{"writable root", func(s *corev1.PodSpec) { f := false; s.Containers[0].SecurityContext.ReadOnlyRootFilesystem = &f }, "readOnlyRootFilesystem"},
		{"capability added", func(s *corev1.PodSpec) {
			s.Containers[0].SecurityContext.Capabilities.Add = []corev1.Capability{"NET_ADMIN"}
		}, "capabilities"},
		{"no memory limit", func(s *corev1.PodSpec) { delete(s.Containers[0].Resources.Limits, corev1.ResourceMemory) }, "memory request and limit"},
		{"inline secret", func(s *corev1.PodSpec) {
			s.Containers[0].Env = append(s.Containers[0].Env, corev1.EnvVar{Name: "STINT_UPSTREAM_KEY", Value: "x"})
		}, "inline value"},
	}
	p := hardeningProblems(base.Spec.Template.Spec)
	require.Emptyf(t, p, "the real Deployment already has problems: %v", p)
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			spec := *base.Spec.Template.Spec.DeepCopy()
			tc.breakIt(&spec)
			p := hardeningProblems(spec)
			assert.Truef(t, slices.ContainsFunc(p, func(s string) bool { return strings.Contains(s, tc.want) }), "problems %v do not mention %q", p, tc.want)
		})
	}
}

// TestKubernetesManifests checks the manifests hang together: the kinds
// are there, selectors select, probes and Services reach the container
// port the config listens on, secrets come from the Secret, and sizes fit
// the config.
func TestKubernetesManifests(t *testing.T) {
	m := loadManifests(t)
	proxy, search := m.deployments["stint-proxy"], m.deployments["stint-search"]
	require.Falsef(t, proxy == nil || search == nil, "want Deployments stint-proxy and stint-search, have %v", slices.Collect(mapsKeys(m.deployments)))
	cfg := parseStintConfig(t, k8sProxyConfig(t, m))

	for name, d := range m.deployments {
		pod := d.Spec.Template
		assert.Truef(t, selects(t, d.Spec.Selector, pod.Labels), "Deployment %s: selector does not select its own pods", name)
		p := hardeningProblems(pod.Spec)
		assert.Emptyf(t, p, "Deployment %s: %s", name, strings.Join(p, "; "))
		for _, c := range pod.Spec.Containers {
			for _, e := range c.Env {
				if e.ValueFrom == nil || e.ValueFrom.SecretKeyRef == nil {
					continue
				}
				ref := e.ValueFrom.SecretKeyRef
				s := m.secrets[ref.Name]
				if assert.NotNilf(t, s, "Deployment %s: env %s refers to Secret %s, which k8s/examples does not show", name, e.Name, ref.Name) {
					assert.Containsf(t, s.StringData, ref.Key, "Deployment %s: env %s refers to key %s, missing from the example Secret", name, e.Name, ref.Key)
				}
			}
			for _, v := range pod.Spec.Volumes {
				if v.PersistentVolumeClaim != nil {
					assert.NotNilf(t, m.pvcs[v.PersistentVolumeClaim.ClaimName], "Deployment %s: volume %s claims %s, which no manifest defines", name, v.Name, v.PersistentVolumeClaim.ClaimName)
				}
			}
		}
	}

	// The proxies.
	if assert.NotNil(t, proxy.Spec.Replicas, "stint-proxy replicas") {
		assert.GreaterOrEqual(t, *proxy.Spec.Replicas, int32(2), "stint-proxy replicas, want at least 2")
	}
	require.Len(t, proxy.Spec.Template.Spec.Containers, 1, "stint-proxy has %d containers, want 1", len(proxy.Spec.Template.Spec.Containers))
	c := proxy.Spec.Template.Spec.Containers[0]
	listenPort := port(t, cfg.Listen)
	for _, pr := range []struct {
		name  string
		probe *corev1.Probe
		path  string
	}{{"readiness", c.ReadinessProbe, "/readyz"}, {"liveness", c.LivenessProbe, "/healthz"}} {
		if !assert.Falsef(t, pr.probe == nil || pr.probe.HTTPGet == nil, "stint-proxy: no HTTP %s probe", pr.name) {
			continue
		}
		got, ok := containerPort(c, pr.probe.HTTPGet.Port)
		assert.Falsef(t, pr.probe.HTTPGet.Path != pr.path || !ok || fmt.Sprint(got) != listenPort, "stint-proxy %s probe: %s on port %v (resolves to %d), want %s on the config's listen port %s",
			pr.name, pr.probe.HTTPGet.Path, pr.probe.HTTPGet.Port.String(), got, pr.path, listenPort)
	}
	svc := m.services["stint"]
	require.False(t, svc == nil || len(svc.Spec.Ports) != 1, "want Service stint with one port")
	assert.True(t, selects(t, &metav1.LabelSelector{MatchLabels: svc.Spec.Selector}, proxy.Spec.Template.Labels), "Service stint does not select the proxy pods")
	target, ok := containerPort(c, svc.Spec.Ports[0].TargetPort)
	assert.Falsef(t, !ok || fmt.Sprint(target) != listenPort, "Service stint targets %s, which is not the listen port %s", svc.Spec.Ports[0].TargetPort.String(), listenPort)
	if assert.False(t, len(m.pdbs) != 1 || !selects(t, m.pdbs[0].Spec.Selector, proxy.Spec.Template.Labels), "want one PodDisruptionBudget selecting the proxy pods") {
		mi := m.pdbs[0].Spec.MinAvailable
		assert.Falsef(t, mi == nil || mi.IntValue() < 1 || mi.IntValue() >= int(*proxy.Spec.Replicas), "PodDisruptionBudget minAvailable %v: want at least 1 and fewer than the replicas, so a drain can proceed", mi)
	}
	require.Len(t, m.hpas, 1, "want one HorizontalPodAutoscaler, have %d", len(m.hpas))
	hpa := m.hpas[0].Spec
	assert.Falsef(t, hpa.ScaleTargetRef.Kind != "Deployment" || hpa.ScaleTargetRef.Name != proxy.Name || hpa.ScaleTargetRef.APIVersion != "apps/v1", "HPA targets %+v, want the stint-proxy Deployment", hpa.ScaleTargetRef)
	assert.Falsef(t, hpa.MinReplicas == nil || *hpa.MinReplicas < 2 || hpa.MaxReplicas <= *hpa.MinReplicas, "HPA replicas %v..%d: want a minimum of at least 2 and room above it", hpa.MinReplicas, hpa.MaxReplicas)
	assert.False(t, len(hpa.Metrics) == 0 || hpa.Metrics[0].Resource == nil || hpa.Metrics[0].Resource.Name != corev1.ResourceCPU, "HPA does not scale on CPU (the requests it is relative to are set)")

	// Sizes against the config.
	memReq, memLim := c.Resources.Requests[corev1.ResourceMemory], c.Resources.Limits[corev1.ResourceMemory]
	assert.Lessf(t, byteSize(t, cfg.Cache.HotBytes), memReq.Value(), "cache.hot_bytes %s does not fit in the memory request %s", cfg.Cache.HotBytes, memReq.String())
	goMem := ""
	for _, e := range c.Env {
		if e.Name == "GOMEMLIMIT" {
			goMem = e.Value
		}
	}
	if assert.NotEmptyf(t, goMem, "GOMEMLIMIT is missing") {
		assert.Lessf(t, byteSize(t, goMem), memLim.Value(), "GOMEMLIMIT %q is not below the memory limit %s", goMem, memLim.String())
	}
	var dataLimit *resource.Quantity
	for _, v := range proxy.Spec.Template.Spec.Volumes {
		if v.Name == "data" && v.EmptyDir != nil {
			dataLimit = v.EmptyDir.SizeLimit
		}
	}
	assert.Falsef(t, dataLimit == nil || byteSize(t, cfg.Cache.MaxBytes) >= dataLimit.Value(), "data emptyDir sizeLimit %v must be above cache.max_bytes %s (the file grows past its cap between evictions)", dataLimit, cfg.Cache.MaxBytes)
	grace := proxy.Spec.Template.Spec.TerminationGracePeriodSeconds
	preStop := int64(0)
	if l := c.Lifecycle; l != nil && l.PreStop != nil && l.PreStop.Sleep != nil {
		preStop = l.PreStop.Sleep.Seconds
	}
	assert.Falsef(t, grace == nil || float64(*grace) <= duration(t, cfg.Server.ShutdownTimeout).Seconds()+float64(preStop), "terminationGracePeriodSeconds %v must exceed preStop %ds + server.shutdown_timeout %s", grace, preStop, cfg.Server.ShutdownTimeout)
	r := cfg.Store.Redis
	assert.False(t, r == nil || len(r.Addrs) < 2, "the Kubernetes config should name several Redis Cluster seeds under store.redis.addrs")

	// The sidecars: several replicas sharing one job queue on the proxies'
	// Redis (their config's store.redis), reaching the proxies through
	// their Service.
	assert.False(t, search.Spec.Replicas == nil || *search.Spec.Replicas < 2 || search.Spec.Strategy.Type != appsv1.RollingUpdateDeploymentStrategyType, "stint-search should run several replicas sharing the queue, replaced in a rolling update")
	sc := search.Spec.Template.Spec.Containers[0]
	got := flagValue(sc.Args, "--config")
	assert.Equal(t, mountPath(sc, "config")+"/stint.yaml", got, "stint-search --config %q, want the proxies' config mounted from ConfigMap stint-config", got)
	assert.True(t, slices.ContainsFunc(sc.Env, func(e corev1.EnvVar) bool { return e.Name == "STINT_REDIS_PASSWORD" }), "stint-search needs STINT_REDIS_PASSWORD, the password_env of store.redis")
	for _, v := range search.Spec.Template.Spec.Volumes {
		assert.False(t, v.Name == "data" && v.EmptyDir == nil, "stint-search's data volume should be an emptyDir: its state is in Redis, and replicas cannot share one ReadWriteOnce claim")
	}
	got, want := flagValue(sc.Args, "--proxy"), fmt.Sprintf("http://%s:%d/v1", svc.Name, svc.Spec.Ports[0].Port)
	assert.Equal(t, want, got, "stint-search --proxy %q, want the proxies' Service %q", got, want)
	searchPort := port(t, flagValue(sc.Args, "--listen"))
	for _, pr := range []*corev1.Probe{sc.ReadinessProbe, sc.LivenessProbe} {
		if !assert.False(t, pr == nil || pr.HTTPGet == nil || pr.HTTPGet.Path != "/healthz", "stint-search: want readiness and liveness probes on /healthz") {
			continue
		}
		got, ok := containerPort(sc, pr.HTTPGet.Port)
		assert.Falsef(t, !ok || fmt.Sprint(got) != searchPort, "stint-search probe port %s is not the --listen port %s", pr.HTTPGet.Port.String(), searchPort)
	}
	ss := m.services["stint-search"]
	assert.False(t, ss == nil || !selects(t, &metav1.LabelSelector{MatchLabels: ss.Spec.Selector}, search.Spec.Template.Labels), "want Service stint-search selecting the sidecar")
	for _, mnt := range sc.VolumeMounts {
		assert.False(t, mnt.MountPath == "/models" && !mnt.ReadOnly, "the model volume must be mounted read-only")
	}

	// The example Secret holds placeholders only.
	for name, s := range m.secrets {
		assert.Emptyf(t, s.Data, "example Secret %s has data: values; use placeholder stringData", name)
		for k, v := range s.StringData {
			assert.Truef(t, strings.HasPrefix(v, "replace-"), "example Secret %s key %s is %q, not a replace-… placeholder", name, k, v)
		}
	}
}

func mapsKeys[V any](m map[string]V) func(func(string) bool) {
	return func(yield func(string) bool) {
		for k := range m {
			if !yield(k) {
				return
			}
		}
	}
}
