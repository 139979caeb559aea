package main

import (
	"flag"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// TestComposeFile checks that docker-compose.yml says what it does: every
// worker runs serve with a valid configuration through the same
// variables the binary reads, keeps one copy of each stream per NATS
// node, and is scraped by Prometheus; Grafana mounts the provisioning and
// the dashboard that exist in the repository.
func TestComposeFile(t *testing.T) {
	t.Parallel()
	root := filepath.Join("..", "..")
	var compose struct {
		Services map[string]struct {
			Command     []string          `yaml:"command"`
			Environment map[string]string `yaml:"environment"`
			Volumes     []string          `yaml:"volumes"`
		} `yaml:"services"`
	}
	readYAML(t, filepath.Join(root, "docker-compose.yml"), &compose)
	var prom struct {
		ScrapeConfigs []struct {
			JobName       string `yaml:"job_name"`
			StaticConfigs []struct {
				Targets []string `yaml:"targets"`
			} `yaml:"static_configs"`
		} `yaml:"scrape_configs"`
	}
	readYAML(t, filepath.Join(root, "deploy", "prometheus", "prometheus.yml"), &prom)
	var targets []string
	for _, sc := range prom.ScrapeConfigs {
		for _, st := range sc.StaticConfigs {
			targets = append(targets, st.Targets...)
		}
	}

	var natsNodes, workers []string
	for name := range compose.Services {
		switch {
		case strings.HasPrefix(name, "nats-"):
			natsNodes = append(natsNodes, name)
		case strings.HasPrefix(name, "worker-"):
			workers = append(workers, name)
		}
	}
	slices.Sort(workers)
	if len(natsNodes) == 0 || len(workers) == 0 {
		t.Fatalf("docker-compose.yml: %d NATS nodes and %d workers, want some of each", len(natsNodes), len(workers))
	}
	header, err := os.ReadFile(filepath.Join(root, "docker-compose.yml"))
	if err != nil {
		t.Fatal(err)
	}
	counts := map[int]string{1: "one", 2: "two", 3: "three", 4: "four"}
	if w := counts[len(workers)] + " rivalmix worker"; !strings.Contains(string(header), w) {
		t.Errorf("docker-compose.yml defines %d workers; its header does not say %q", len(workers), w)
	}
	for _, w := range workers {
		svc := compose.Services[w]
		if !slices.Contains(svc.Command, "serve") {
			t.Errorf("%s: command %v does not run serve", w, svc.Command)
		}
		// The environment must parse as serve's flags.
		fs := flag.NewFlagSet("serve", flag.ContinueOnError)
		var f serviceFlags
		f.register(fs, "rivalmix.db", "127.0.0.1:4222")
		for k, v := range svc.Environment {
			name := strings.ToLower(strings.ReplaceAll(strings.TrimPrefix(k, envPrefix), "_", "-"))
			if envName(name) != k || fs.Lookup(name) == nil {
				t.Errorf("%s: %s is not a variable serve reads", w, k)
				continue
			}
			if err := fs.Set(name, v); err != nil {
				t.Errorf("%s: %s=%q: %v", w, k, v, err)
			}
		}
		if _, err := f.serviceConfig(); err != nil {
			t.Errorf("%s: configuration: %v", w, err)
		}
		if f.replicas != min(len(natsNodes), 5) {
			t.Errorf("%s: %d stream replicas, want one per NATS node (%d)", w, f.replicas, len(natsNodes))
		}
		if !slices.Contains(targets, w+":"+portOf(t, f.httpAddr)) {
			t.Errorf("%s: Prometheus targets %v lack %s:%s", w, targets, w, portOf(t, f.httpAddr))
		}
	}
	if len(targets) != len(workers) {
		t.Errorf("Prometheus scrapes %v, want the %d workers %v", targets, len(workers), workers)
	}

	g, ok := compose.Services["grafana"]
	if !ok {
		t.Fatal("docker-compose.yml has no grafana service")
	}
	mounted := map[string]bool{}
	for _, v := range g.Volumes {
		src, _, _ := strings.Cut(v, ":")
		if _, err := os.Stat(filepath.Join(root, src)); err != nil {
			t.Errorf("grafana mounts %s: %v", src, err)
		}
		mounted[filepath.Clean(src)] = true
	}
	for _, want := range []string{"deploy/grafana/provisioning", "deploy/grafana/rivalmix.json"} {
		if !mounted[want] {
			t.Errorf("grafana does not mount %s (mounts %v)", want, g.Volumes)
		}
	}
}

func readYAML(t *testing.T, path string, v any) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := yaml.Unmarshal(b, v); err != nil {
		t.Fatalf("%s: %v", path, err)
	}
}

func portOf(t *testing.T, addr string) string {
	t.Helper()
	i := strings.LastIndexByte(addr, ':')
	if i < 0 {
		t.Fatalf("address %q has no port", addr)
	}
	if _, err := strconv.Atoi(addr[i+1:]); err != nil {
		t.Fatalf("address %q: port: %v", addr, err)
	}
	return addr[i+1:]
}
