package deploy

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"path"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"gopkg.in/yaml.v3"
)

// The Kubernetes manifests are decoded strictly into the structs below, which model exactly the
// fields the kit uses with the names of the Kubernetes API (apps/v1, core/v1): a misspelt or
// misplaced field ("readinesProbe", a subPath under volumes) is an unknown field and fails the
// test. A field the kit starts to use has to be added here on purpose. This is a structural
// check, not the API server's validation; no schema validator that works offline resolves from
// the module proxy (kubeconform downloads its schemas).

type objectMeta struct {
	Name        string            `yaml:"name"`
	Namespace   string            `yaml:"namespace"`
	Labels      map[string]string `yaml:"labels"`
	Annotations map[string]string `yaml:"annotations"`
}

type namespace struct {
	APIVersion string     `yaml:"apiVersion"`
	Kind       string     `yaml:"kind"`
	Metadata   objectMeta `yaml:"metadata"`
}

type configMap struct {
	APIVersion string            `yaml:"apiVersion"`
	Kind       string            `yaml:"kind"`
	Metadata   objectMeta        `yaml:"metadata"`
	Data       map[string]string `yaml:"data"`
}

type service struct {
	APIVersion string     `yaml:"apiVersion"`
	Kind       string     `yaml:"kind"`
	Metadata   objectMeta `yaml:"metadata"`
	Spec       struct {
		ClusterIP                string            `yaml:"clusterIP"`
		PublishNotReadyAddresses bool              `yaml:"publishNotReadyAddresses"`
		Selector                 map[string]string `yaml:"selector"`
		Ports                    []struct {
			Name       string `yaml:"name"`
			Port       int    `yaml:"port"`
			TargetPort any    `yaml:"targetPort"`
			Protocol   string `yaml:"protocol"`
		} `yaml:"ports"`
	} `yaml:"spec"`
}

type probe struct {
	HTTPGet *struct {
		Path string `yaml:"path"`
		Port any    `yaml:"port"`
	} `yaml:"httpGet"`
	InitialDelaySeconds int `yaml:"initialDelaySeconds"`
	PeriodSeconds       int `yaml:"periodSeconds"`
	TimeoutSeconds      int `yaml:"timeoutSeconds"`
	FailureThreshold    int `yaml:"failureThreshold"`
}

type container struct {
	Name            string   `yaml:"name"`
	Image           string   `yaml:"image"`
	ImagePullPolicy string   `yaml:"imagePullPolicy"`
	Args            []string `yaml:"args"`
	Env             []struct {
		Name      string `yaml:"name"`
		Value     string `yaml:"value"`
		ValueFrom *struct {
			ResourceFieldRef *struct {
				ContainerName string `yaml:"containerName"`
				Resource      string `yaml:"resource"`
				Divisor       string `yaml:"divisor"`
			} `yaml:"resourceFieldRef"`
		} `yaml:"valueFrom"`
	} `yaml:"env"`
	Ports []struct {
		Name          string `yaml:"name"`
		ContainerPort int    `yaml:"containerPort"`
		Protocol      string `yaml:"protocol"`
	} `yaml:"ports"`
	StartupProbe   *probe `yaml:"startupProbe"`
	LivenessProbe  *probe `yaml:"livenessProbe"`
	ReadinessProbe *probe `yaml:"readinessProbe"`
	Resources      struct {
		Requests map[string]string `yaml:"requests"`
		Limits   map[string]string `yaml:"limits"`
	} `yaml:"resources"`
	SecurityContext struct {
		RunAsNonRoot             *bool `yaml:"runAsNonRoot"`
		AllowPrivilegeEscalation *bool `yaml:"allowPrivilegeEscalation"`
		ReadOnlyRootFilesystem   *bool `yaml:"readOnlyRootFilesystem"`
		Capabilities             struct {
			Drop []string `yaml:"drop"`
			Add  []string `yaml:"add"`
		} `yaml:"capabilities"`
	} `yaml:"securityContext"`
	VolumeMounts []struct {
		Name      string `yaml:"name"`
		MountPath string `yaml:"mountPath"`
		ReadOnly  bool   `yaml:"readOnly"`
		SubPath   string `yaml:"subPath"`
	} `yaml:"volumeMounts"`
}

type volume struct {
	Name      string `yaml:"name"`
	ConfigMap *struct {
		Name string `yaml:"name"`
	} `yaml:"configMap"`
	Secret *struct {
		SecretName  string `yaml:"secretName"`
		DefaultMode int    `yaml:"defaultMode"`
	} `yaml:"secret"`
	EmptyDir *struct {
		SizeLimit string `yaml:"sizeLimit"`
	} `yaml:"emptyDir"`
}

type deployment struct {
	APIVersion string     `yaml:"apiVersion"`
	Kind       string     `yaml:"kind"`
	Metadata   objectMeta `yaml:"metadata"`
	Spec       struct {
		Replicas *int `yaml:"replicas"`
		Strategy struct {
			Type string `yaml:"type"`
		} `yaml:"strategy"`
		RevisionHistoryLimit int `yaml:"revisionHistoryLimit"`
		Selector             struct {
			MatchLabels map[string]string `yaml:"matchLabels"`
		} `yaml:"selector"`
		Template struct {
			Metadata objectMeta `yaml:"metadata"`
			Spec     struct {
				AutomountServiceAccountToken  *bool `yaml:"automountServiceAccountToken"`
				EnableServiceLinks            *bool `yaml:"enableServiceLinks"`
				TerminationGracePeriodSeconds int   `yaml:"terminationGracePeriodSeconds"`
				SecurityContext               struct {
					RunAsNonRoot   *bool  `yaml:"runAsNonRoot"`
					RunAsUser      *int64 `yaml:"runAsUser"`
					RunAsGroup     *int64 `yaml:"runAsGroup"`
					FSGroup        *int64 `yaml:"fsGroup"`
					SeccompProfile struct {
						Type string `yaml:"type"`
					} `yaml:"seccompProfile"`
				} `yaml:"securityContext"`
				Containers []container `yaml:"containers"`
				Volumes    []volume    `yaml:"volumes"`
			} `yaml:"spec"`
		} `yaml:"template"`
	} `yaml:"spec"`
}

type kustomization struct {
	APIVersion string   `yaml:"apiVersion"`
	Kind       string   `yaml:"kind"`
	Namespace  string   `yaml:"namespace"`
	Resources  []string `yaml:"resources"`
	Images     []struct {
		Name    string `yaml:"name"`
		NewName string `yaml:"newName"`
		NewTag  string `yaml:"newTag"`
	} `yaml:"images"`
}

// kit is every object of deploy/kubernetes, by kind.
type kit struct {
	kustomization kustomization
	namespaces    []namespace
	configMaps    []configMap
	services      []service
	deployments   []deployment
	files         []string // manifest files other than kustomization.yaml
}

// knownKinds maps each kind the kit may use to its apiVersion.
var knownKinds = map[string]string{
	"Namespace":     "v1",
	"ConfigMap":     "v1",
	"Service":       "v1",
	"Deployment":    "apps/v1",
	"Kustomization": "kustomize.config.k8s.io/v1beta1",
}

// decodeStrict decodes every YAML document of data in turn: first loosely to learn its kind,
// then strictly (unknown fields are errors) into the struct that add returns for that kind.
func decodeStrict(name string, data []byte, add func(kind string) (any, error)) error {
	loose := yaml.NewDecoder(bytes.NewReader(data))
	strict := yaml.NewDecoder(bytes.NewReader(data))
	strict.KnownFields(true)
	for i := 1; ; i++ {
		var head struct {
			APIVersion string `yaml:"apiVersion"`
			Kind       string `yaml:"kind"`
		}
		err := loose.Decode(&head)
		if errors.Is(err, io.EOF) {
			if i == 1 {
				return fmt.Errorf("%s: no YAML document", name)
			}
			return nil
		}
		if err != nil {
			return fmt.Errorf("%s, document %d: %w", name, i, err)
		}
		if want, ok := knownKinds[head.Kind]; !ok || want != head.APIVersion {
			return fmt.Errorf("%s, document %d: apiVersion %q kind %q is not one the kit knows (%v)", name, i, head.APIVersion, head.Kind, knownKinds)
		}
		dst, err := add(head.Kind)
		if err != nil {
			return fmt.Errorf("%s, document %d: %w", name, i, err)
		}
		if err := strict.Decode(dst); err != nil {
			return fmt.Errorf("%s, document %d (%s): %w", name, i, head.Kind, err)
		}
	}
}

func loadKit(t *testing.T, dir string) *kit {
	t.Helper()
	k := &kit{}
	paths, err := filepath.Glob(filepath.Join(dir, "*.y*ml"))
	if err != nil || len(paths) == 0 {
		t.Fatalf("no manifests in %s: %v", dir, err)
	}
	for _, p := range paths {
		base := filepath.Base(p)
		if base != "kustomization.yaml" {
			k.files = append(k.files, base)
		}
		err := decodeStrict(p, readFile(t, p), func(kind string) (any, error) {
			switch kind {
			case "Kustomization":
				if base != "kustomization.yaml" {
					return nil, fmt.Errorf("a Kustomization outside kustomization.yaml")
				}
				return &k.kustomization, nil
			case "Namespace":
				k.namespaces = append(k.namespaces, namespace{})
				return &k.namespaces[len(k.namespaces)-1], nil
			case "ConfigMap":
				k.configMaps = append(k.configMaps, configMap{})
				return &k.configMaps[len(k.configMaps)-1], nil
			case "Service":
				k.services = append(k.services, service{})
				return &k.services[len(k.services)-1], nil
			case "Deployment":
				k.deployments = append(k.deployments, deployment{})
				return &k.deployments[len(k.deployments)-1], nil
			}
			return nil, fmt.Errorf("no struct for kind %s", kind)
		})
		if err != nil {
			t.Fatal(err)
		}
	}
	return k
}

// userProvided returns the names listed in deploy/README.md's "User-provided objects" section:
// the list items that start with a name in backquotes.
func userProvided(t *testing.T) []string {
	t.Helper()
	readme := string(readFile(t, "README.md"))
	_, section, ok := strings.Cut(readme, "## User-provided objects")
	if !ok {
		t.Fatal("README.md has no \"## User-provided objects\" section")
	}
	if next := strings.Index(section, "\n## "); next >= 0 {
		section = section[:next]
	}
	var names []string
	for _, line := range strings.Split(section, "\n") {
		if rest, ok := strings.CutPrefix(line, "- `"); ok {
			if name, _, ok := strings.Cut(rest, "`"); ok {
				names = append(names, name)
			}
		}
	}
	return names
}

func TestKubernetesManifests(t *testing.T) {
	for _, dir := range []string{"kubernetes", "kubernetes-fleet"} {
		t.Run(dir, func(t *testing.T) { checkKit(t, dir) })
	}
}

// checkKit checks the Kubernetes kit in dir: the per-plant kit (one Deployment per plant) or the
// fleet kit (one Deployment of daemons that take their plants from the fleet's bucket).
func checkKit(t *testing.T, dir string) {
	k := loadKit(t, dir)

	// The kustomization lists every manifest, and only existing ones.
	if k.kustomization.Kind == "" {
		t.Fatal("kubernetes/kustomization.yaml is missing")
	}
	res := slices.Clone(k.kustomization.Resources)
	slices.Sort(res)
	files := slices.Clone(k.files)
	slices.Sort(files)
	if !slices.Equal(res, files) {
		t.Errorf("kustomization.yaml resources %v, want exactly the manifests of the directory %v", res, files)
	}
	ns := k.kustomization.Namespace
	if len(k.namespaces) != 1 || k.namespaces[0].Metadata.Name != ns {
		t.Errorf("want one Namespace named %q (the kustomization's), have %v", ns, k.namespaces)
	} else if l := k.namespaces[0].Metadata.Labels["pod-security.kubernetes.io/enforce"]; l != "restricted" {
		t.Errorf("Namespace %s: pod-security enforce %q, want restricted", ns, l)
	}
	for _, m := range append(append(metas(k.configMaps, func(c configMap) objectMeta { return c.Metadata }),
		metas(k.services, func(s service) objectMeta { return s.Metadata })...),
		metas(k.deployments, func(d deployment) objectMeta { return d.Metadata })...) {
		if m.Namespace != ns {
			t.Errorf("%s: namespace %q, want %q", m.Name, m.Namespace, ns)
		}
	}

	cms := map[string]configMap{}
	for _, c := range k.configMaps {
		cms[c.Metadata.Name] = c
	}
	documented := userProvided(t)
	if len(k.deployments) == 0 {
		t.Fatal("no Deployment in the kit")
	}
	for _, d := range k.deployments {
		checkDeployment(t, d, cms, documented)
		checkServiceSelects(t, k.services, d)
	}
	for _, s := range k.services {
		if s.Spec.ClusterIP != "None" || !s.Spec.PublishNotReadyAddresses {
			t.Errorf("Service %s: want headless (clusterIP: None) with publishNotReadyAddresses, so Prometheus scrapes every pod, ready or not", s.Metadata.Name)
		}
	}
}

func metas[T any](xs []T, f func(T) objectMeta) []objectMeta {
	var out []objectMeta
	for _, x := range xs {
		out = append(out, f(x))
	}
	return out
}

func checkDeployment(t *testing.T, d deployment, cms map[string]configMap, documented []string) {
	name := "Deployment " + d.Metadata.Name
	spec := d.Spec
	fleet := len(spec.Template.Spec.Containers) == 1 && slices.ContainsFunc(spec.Template.Spec.Containers[0].Args,
		func(a string) bool { return strings.HasPrefix(a, "--fleet=") })
	switch {
	case fleet && (spec.Replicas == nil || *spec.Replicas < 2):
		t.Errorf("%s: a fleet wants at least 2 replicas (one takes over from another)", name)
	case !fleet && (spec.Replicas == nil || *spec.Replicas != 1):
		t.Errorf("%s: want replicas: 1 (an estimator is stateful per plant)", name)
	}
	if !fleet && spec.Strategy.Type != "Recreate" {
		t.Errorf("%s: strategy %q, want Recreate (no two estimators of one plant side by side)", name, spec.Strategy.Type)
	}
	for k, v := range spec.Selector.MatchLabels {
		if spec.Template.Metadata.Labels[k] != v {
			t.Errorf("%s: selector %s=%s does not match the pod template's labels", name, k, v)
		}
	}
	pod := spec.Template.Spec
	if pod.SecurityContext.RunAsNonRoot == nil || !*pod.SecurityContext.RunAsNonRoot {
		t.Errorf("%s: pod securityContext.runAsNonRoot must be true", name)
	}
	if pod.SecurityContext.RunAsUser == nil || *pod.SecurityContext.RunAsUser == 0 {
		t.Errorf("%s: pod securityContext.runAsUser must be a non-zero uid", name)
	}
	if pod.SecurityContext.SeccompProfile.Type != "RuntimeDefault" {
		t.Errorf("%s: seccompProfile %q, want RuntimeDefault", name, pod.SecurityContext.SeccompProfile.Type)
	}
	if pod.AutomountServiceAccountToken == nil || *pod.AutomountServiceAccountToken {
		t.Errorf("%s: automountServiceAccountToken must be false (the daemon never calls the API)", name)
	}

	vols := map[string]volume{}
	for _, v := range pod.Volumes {
		vols[v.Name] = v
		switch {
		case v.ConfigMap != nil:
			if _, ok := cms[v.ConfigMap.Name]; !ok && !slices.Contains(documented, v.ConfigMap.Name) {
				t.Errorf("%s: volume %s uses ConfigMap %q, which is neither in the kit nor listed in README.md's user-provided objects", name, v.Name, v.ConfigMap.Name)
			}
		case v.Secret != nil:
			if !slices.Contains(documented, v.Secret.SecretName) {
				t.Errorf("%s: volume %s uses Secret %q, which is not listed in README.md's user-provided objects", name, v.Name, v.Secret.SecretName)
			}
		case v.EmptyDir != nil:
		default:
			t.Errorf("%s: volume %s has no source the kit knows", name, v.Name)
		}
	}
	if len(pod.Containers) != 1 {
		t.Fatalf("%s: %d containers, want 1", name, len(pod.Containers))
	}
	c := pod.Containers[0]

	// Ports and probes.
	ports := map[string]int{}
	for _, p := range c.Ports {
		ports[p.Name] = p.ContainerPort
	}
	metricsPort, ok := ports["metrics"]
	if !ok {
		t.Fatalf("%s: no container port named metrics", name)
	}
	for _, pr := range []struct {
		kind, path string
		p          *probe
	}{{"livenessProbe", "/healthz", c.LivenessProbe}, {"readinessProbe", "/readyz", c.ReadinessProbe}, {"startupProbe", "/healthz", c.StartupProbe}} {
		if pr.p == nil || pr.p.HTTPGet == nil {
			t.Errorf("%s: no HTTP %s", name, pr.kind)
			continue
		}
		if pr.p.HTTPGet.Path != pr.path {
			t.Errorf("%s: %s on %q, want %s", name, pr.kind, pr.p.HTTPGet.Path, pr.path)
		}
		if got := resolvePort(pr.p.HTTPGet.Port, ports); got != metricsPort {
			t.Errorf("%s: %s on port %v (%d), want the metrics port %d", name, pr.kind, pr.p.HTTPGet.Port, got, metricsPort)
		}
	}

	// Arguments: known flags, the HTTP listener on the container port, plant files in a
	// ConfigMap mount.
	args := c.Args
	if len(args) == 0 || args[0] != "run" {
		t.Fatalf("%s: args %v, want run [flags] PLANT.yaml…", name, args)
	}
	flags := map[string]string{}
	var plants []string
	for i, a := range args[1:] {
		if !strings.HasPrefix(a, "-") {
			plants = args[1+i:]
			break
		}
		f, v, ok := strings.Cut(a, "=")
		if !ok || !slices.Contains(daemonFlags, f) {
			t.Errorf("%s: argument %q is not --flag=value with a flag of surmise run %v", name, a, daemonFlags)
			continue
		}
		flags[f] = v
	}
	if listen, ok := flags["--listen"]; !ok || !strings.HasSuffix(listen, ":"+strconv.Itoa(metricsPort)) || strings.HasPrefix(listen, "127.") {
		t.Errorf("%s: --listen=%q, want the pod's interfaces on the metrics port %d (the default 127.0.0.1 is unreachable for probes)", name, listen, metricsPort)
	}

	// Mounts: every mount has a volume, none uses subPath, and the files the daemon reads are in one.
	mounts := map[string]string{} // mount path → volume
	for _, m := range c.VolumeMounts {
		if m.SubPath != "" {
			t.Errorf("%s: volume mount %s uses subPath %q: a subPath mount never sees updates, mount the directory", name, m.Name, m.SubPath)
		}
		if _, ok := vols[m.Name]; !ok {
			t.Errorf("%s: volume mount %s has no volume", name, m.Name)
		}
		mounts[m.MountPath] = m.Name
	}
	switch {
	case fleet && len(plants) > 0:
		t.Errorf("%s: a fleet daemon takes its plants from the fleet's bucket, not plant files %v", name, plants)
	case fleet && flags["--nats"] == "":
		t.Errorf("%s: a fleet needs --nats (a NATS server with JetStream shared by the replicas)", name)
	case fleet && flags["--metrics"] != "summary":
		t.Errorf("%s: --metrics=%q, want summary for a fleet (few series per estimator)", name, flags["--metrics"])
	case !fleet && len(plants) == 0:
		t.Errorf("%s: no plant file in args", name)
	}
	for _, p := range plants {
		v, ok := vols[mounts[path.Dir(p)]]
		if !ok || v.ConfigMap == nil {
			t.Errorf("%s: plant file %s is not in a mounted ConfigMap directory", name, p)
			continue
		}
		cm, ok := cms[v.ConfigMap.Name]
		if !ok {
			continue
		}
		plant, ok := cm.Data[path.Base(p)]
		if !ok {
			t.Errorf("%s: plant file %s is not a key of ConfigMap %s", name, p, cm.Metadata.Name)
			continue
		}
		var fields struct {
			Gains string `yaml:"gains"`
		}
		if err := yaml.Unmarshal([]byte(plant), &fields); err != nil {
			t.Errorf("ConfigMap %s, key %s: %v", cm.Metadata.Name, path.Base(p), err)
		}
		if _, ok := cm.Data[fields.Gains]; !ok {
			t.Errorf("ConfigMap %s: the plant file names gains file %q, which is not a key beside it", cm.Metadata.Name, fields.Gains)
		}
	}
	for _, f := range []string{"--nkey", "--creds", "--tls-ca", "--tls-cert", "--tls-key"} {
		if v, ok := flags[f]; ok {
			if vol, ok := vols[mounts[path.Dir(v)]]; !ok || vol.Secret == nil {
				t.Errorf("%s: %s=%s is not in a mounted Secret", name, f, v)
			}
		}
	}
	if sd, ok := flags["--state-dir"]; ok {
		if _, ok := mounts[sd]; !ok {
			t.Errorf("%s: --state-dir=%s is not a mounted volume (the root file system is read-only)", name, sd)
		}
	}

	// Memory: a limit, and GOMEMLIMIT taken from it.
	if c.Resources.Limits["memory"] == "" {
		t.Errorf("%s: no memory limit", name)
	}
	var gomemlimit bool
	for _, e := range c.Env {
		if e.Name != "GOMEMLIMIT" {
			continue
		}
		gomemlimit = true
		if e.ValueFrom == nil || e.ValueFrom.ResourceFieldRef == nil ||
			e.ValueFrom.ResourceFieldRef.Resource != "limits.memory" || e.ValueFrom.ResourceFieldRef.ContainerName != c.Name {
			t.Errorf("%s: GOMEMLIMIT must come from resourceFieldRef limits.memory of container %s", name, c.Name)
		}
		if d := e.ValueFrom.ResourceFieldRef.Divisor; d != "" && d != "1" {
			t.Errorf("%s: GOMEMLIMIT divisor %q: the Go runtime reads a plain number as bytes", name, d)
		}
	}
	if !gomemlimit {
		t.Errorf("%s: no GOMEMLIMIT in the environment", name)
	}

	sc := c.SecurityContext
	if sc.RunAsNonRoot == nil || !*sc.RunAsNonRoot || sc.ReadOnlyRootFilesystem == nil || !*sc.ReadOnlyRootFilesystem ||
		sc.AllowPrivilegeEscalation == nil || *sc.AllowPrivilegeEscalation || !slices.Equal(sc.Capabilities.Drop, []string{"ALL"}) || len(sc.Capabilities.Add) > 0 {
		t.Errorf("%s: container securityContext must be runAsNonRoot, readOnlyRootFilesystem, no privilege escalation, all capabilities dropped", name)
	}
}

// resolvePort turns a probe's port (a number or a port name) into a number, or -1.
func resolvePort(p any, named map[string]int) int {
	switch v := p.(type) {
	case int:
		return v
	case string:
		if n, ok := named[v]; ok {
			return n
		}
	}
	return -1
}

func checkServiceSelects(t *testing.T, services []service, d deployment) {
	pod := d.Spec.Template.Metadata.Labels
	for _, s := range services {
		selects := len(s.Spec.Selector) > 0
		for k, v := range s.Spec.Selector {
			if pod[k] != v {
				selects = false
			}
		}
		if !selects {
			continue
		}
		names := map[string]int{}
		for _, p := range d.Spec.Template.Spec.Containers[0].Ports {
			names[p.Name] = p.ContainerPort
		}
		for _, p := range s.Spec.Ports {
			if resolvePort(p.TargetPort, names) < 0 {
				t.Errorf("Service %s: port %s targets %v, which Deployment %s's container does not expose", s.Metadata.Name, p.Name, p.TargetPort, d.Metadata.Name)
			}
		}
		return
	}
	t.Errorf("Deployment %s: no Service selects its pods (Prometheus would not find them)", d.Metadata.Name)
}

// TestKubernetesPlantMatchesDemo keeps the ConfigMap's example plant equal to the demo plant,
// which the config package's tests parse; a change to one must be copied to the other.
func TestKubernetesPlantMatchesDemo(t *testing.T) {
	k := loadKit(t, "kubernetes")
	demo := string(readFile(t, "../testdata/plants/hotwater-loop.yaml"))
	for _, c := range k.configMaps {
		if got, ok := c.Data["hotwater-loop.yaml"]; ok {
			if got != demo {
				t.Errorf("ConfigMap %s: hotwater-loop.yaml differs from testdata/plants/hotwater-loop.yaml; copy the file into kubernetes/configmap.yaml (indented by four spaces)", c.Metadata.Name)
			}
			return
		}
	}
	t.Error("no ConfigMap in the kit holds hotwater-loop.yaml")
}

// TestScrapeConfigMatchesKit ties deploy/prometheus/scrape.yml to the kit: its job names match
// the SurmiseTargetDown alert, and its DNS service discovery name is the metrics Service's port,
// name and namespace.
func TestScrapeConfigMatchesKit(t *testing.T) {
	var cfg struct {
		ScrapeConfigs []struct {
			JobName      string `yaml:"job_name"`
			DNSSDConfigs []struct {
				Names []string `yaml:"names"`
			} `yaml:"dns_sd_configs"`
		} `yaml:"scrape_configs"`
	}
	if err := yaml.Unmarshal(readFile(t, "prometheus/scrape.yml"), &cfg); err != nil {
		t.Fatalf("prometheus/scrape.yml: %v", err)
	}
	k := loadKit(t, "kubernetes")
	var want []string
	for _, s := range k.services {
		for _, p := range s.Spec.Ports {
			want = append(want, fmt.Sprintf("_%s._tcp.%s.%s.svc.cluster.local", p.Name, s.Metadata.Name, s.Metadata.Namespace))
		}
	}
	var dns int
	for _, j := range cfg.ScrapeConfigs {
		if !strings.HasPrefix(j.JobName, "surmise") {
			t.Errorf("scrape job %q: SurmiseTargetDown matches job=~\"surmise.*\" only", j.JobName)
		}
		for _, d := range j.DNSSDConfigs {
			for _, n := range d.Names {
				dns++
				if !slices.Contains(want, n) {
					t.Errorf("scrape job %s: DNS name %s is none of the kit's Service ports %v", j.JobName, n, want)
				}
			}
		}
	}
	if dns == 0 {
		t.Error("scrape.yml has no DNS service discovery for the Kubernetes Service")
	}
}

// TestDecodeStrictRejects shows the strict decoding catches the mistakes it is there for.
func TestDecodeStrictRejects(t *testing.T) {
	tests := []struct {
		name, doc string
	}{
		{"misspelt probe", "apiVersion: apps/v1\nkind: Deployment\nmetadata: {name: x}\nspec:\n  template:\n    spec:\n      containers:\n        - name: c\n          readinesProbe: {}\n"},
		{"unknown kind", "apiVersion: v1\nkind: Pod\nmetadata: {name: x}\n"},
		{"wrong apiVersion", "apiVersion: extensions/v1beta1\nkind: Deployment\nmetadata: {name: x}\n"},
		{"field at the wrong level", "apiVersion: v1\nkind: ConfigMap\nmetadata: {name: x}\nsubPath: a\n"},
		{"empty file", "# nothing\n"},
	}
	for _, tc := range tests {
		err := decodeStrict(tc.name, []byte(tc.doc), func(kind string) (any, error) {
			switch kind {
			case "Deployment":
				return &deployment{}, nil
			case "ConfigMap":
				return &configMap{}, nil
			}
			return nil, fmt.Errorf("unexpected kind %s", kind)
		})
		if err == nil {
			t.Errorf("%s: accepted", tc.name)
		}
	}
}
