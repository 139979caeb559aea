package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/sequential/synth"
	"rivalmix/state"
	"rivalmix/stream"
)

// freePorts returns n distinct free loopback ports. A port may be taken
// by someone else between this call and its use; the servers then fail
// to start and the test fails, it never skips.
func freePorts(t *testing.T, n int) []int {
	t.Helper()
	var out []int
	var lns []net.Listener
	for range n {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		lns = append(lns, ln)
		out = append(out, ln.Addr().(*net.TCPAddr).Port)
	}
	for _, ln := range lns {
		ln.Close()
	}
	return out
}

// natsCluster is three nats-server instances in this process, routed
// to each other on loopback, with JetStream.
type natsCluster struct {
	servers []*server.Server
	urls    []string
}

func startCluster(t *testing.T) *natsCluster {
	t.Helper()
	ports := freePorts(t, 6)
	c := &natsCluster{}
	for i := range 3 {
		var routes []string
		for j := range 3 {
			if j != i {
				routes = append(routes, fmt.Sprintf("nats://127.0.0.1:%d", ports[3+j]))
			}
		}
		opts := &server.Options{
			ServerName: fmt.Sprintf("n%d", i+1),
			Host:       "127.0.0.1",
			Port:       ports[i],
			JetStream:  true,
			StoreDir:   t.TempDir(),
			Cluster:    server.ClusterOpts{Name: "rivalmix-test", Host: "127.0.0.1", Port: ports[3+i]},
			Routes:     server.RoutesFromStr(strings.Join(routes, ",")),
			NoSigs:     true,
			NoLog:      os.Getenv("RIVALMIX_TEST_NATS_LOG") == "",
		}
		s, err := server.NewServer(opts)
		if err != nil {
			t.Fatalf("server n%d: %v", i+1, err)
		}
		go s.Start()
		t.Cleanup(func() {
			s.Shutdown()
			s.WaitForShutdown()
		})
		if !s.ReadyForConnections(10 * time.Second) {
			t.Fatalf("server n%d not ready", i+1)
		}
		c.servers = append(c.servers, s)
		c.urls = append(c.urls, s.ClientURL())
	}
	return c
}

// url is every server's client URL, comma-separated.
func (c *natsCluster) url() string { return strings.Join(c.urls, ",") }

// buildBinary builds rivalmix into a temporary directory.
func buildBinary(t testing.TB) string {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "rivalmix")
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	out, err := exec.CommandContext(ctx, "go", "build", "-o", bin, ".").CombinedOutput()
	if err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// workerProc is one `rivalmix serve` process.
type workerProc struct {
	name string
	cmd  *exec.Cmd
	log  string
	done chan error
}

func startWorker(t testing.TB, bin, dir, name, url string, extra ...string) *workerProc {
	t.Helper()
	return startWorkerEnv(t, nil, bin, dir, name, url, extra...)
}

// startWorkerEnv is startWorker with extra environment variables.
func startWorkerEnv(t testing.TB, env []string, bin, dir, name, url string, extra ...string) *workerProc {
	t.Helper()
	args := []string{"serve", "--nats", url, "--state", filepath.Join(dir, name+".db"), "--http-addr", "",
		"--worker-id", name, "--quiet-period", "0", "--particles", "32", "--batch", "16", "--fetch", "8"}
	args = append(args, extra...)
	logPath := filepath.Join(dir, name+".log")
	f, err := os.Create(logPath)
	if err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(bin, args...)
	cmd.Stdout, cmd.Stderr = f, f
	if env != nil {
		cmd.Env = append(os.Environ(), env...)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	w := &workerProc{name: name, cmd: cmd, log: logPath, done: make(chan error, 1)}
	go func() {
		w.done <- cmd.Wait()
		f.Close()
	}()
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-w.done
		w.done <- nil
		if t.Failed() {
			b, _ := os.ReadFile(logPath)
			if len(b) > 16<<10 {
				b = b[len(b)-16<<10:]
			}
			t.Logf("log of %s:\n%s", name, b)
		}
	})
	return w
}

// stop sends SIGTERM and waits for a clean exit.
func (w *workerProc) stop(t testing.TB) {
	t.Helper()
	if err := w.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatalf("%s: SIGTERM: %v", w.name, err)
	}
	select {
	case err := <-w.done:
		w.done <- err
		if err != nil {
			t.Errorf("%s exited with %v", w.name, err)
		}
	case <-time.After(30 * time.Second):
		t.Fatalf("%s did not stop within 30 s of SIGTERM", w.name)
	}
}

// clusterInput is refits of the categories as (subject, body) pairs, one
// slice per refit, each category's refit-complete after its products.
func clusterInput(ncat, products, refits int) [][][2]string {
	idx := make([]int, ncat)
	for i := range idx {
		idx[i] = i
	}
	return clusterInputOf(idx, products, refits)
}

// clusterInputOf is clusterInput over the categories cereal-<i> for the
// given indices i.
func clusterInputOf(idx []int, products, refits int) [][][2]string {
	type cat struct {
		name string
		seq  *synth.Sequence
	}
	var cats []cat
	for _, i := range idx {
		cfg := synth.Scenario()
		cfg.Category = fmt.Sprintf("cereal-%02d", i)
		cfg.Products = products
		cfg.FirstID = 100 * i
		cats = append(cats, cat{cfg.Category, synth.NewSequence(cfg, refits, 0.25, rand.New(rand.NewPCG(uint64(11+i), 0x5eed)))})
	}
	out := make([][][2]string, refits)
	for r := range refits {
		refit := fmt.Sprintf("2026-W%02d", 40+r)
		var per [][][2]string
		for _, c := range cats {
			var ms [][2]string
			for _, p := range c.seq.Refit(r) {
				ms = append(ms, [2]string{"rivalmix.in." + c.name, string(p.MessageJSON(refit))})
			}
			ms = append(ms, [2]string{"rivalmix.in." + c.name, fmt.Sprintf(`{"refit":%q,"complete":true,"expected":%d}`, refit, products)})
			per = append(per, ms)
		}
		for i := 0; ; i++ {
			more := false
			for _, ms := range per {
				if i < len(ms) {
					out[r] = append(out[r], ms[i])
					more = true
				}
			}
			if !more {
				break
			}
		}
	}
	return out
}

func connectJS(t testing.TB, url string) (*nats.Conn, jetstream.JetStream) {
	t.Helper()
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(100*time.Millisecond), nats.RetryOnFailedConnect(true))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	return nc, js
}

// publishAll publishes msgs one by one, retrying each until it is
// acknowledged (a server may be away).
func publishAll(t testing.TB, ctx context.Context, js jetstream.JetStream, msgs [][2]string) {
	t.Helper()
	for _, m := range msgs {
		for {
			pctx, cancel := context.WithTimeout(ctx, 2*time.Second)
			_, err := js.Publish(pctx, m[0], []byte(m[1]))
			cancel()
			if err == nil {
				break
			}
			if ctx.Err() != nil {
				t.Fatalf("publish %s: %v", m[0], err)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
}

// outputSummary is what the test reads from the output stream.
type outputSummary struct {
	ids       map[string]int // event id -> times stored
	summaries map[string]int // category@refit -> summary events
}

func readOutput(t testing.TB, ctx context.Context, js jetstream.JetStream) (outputSummary, error) {
	out := outputSummary{ids: map[string]int{}, summaries: map[string]int{}}
	st, err := js.Stream(ctx, "RIVALMIX_OUT")
	if err != nil {
		return out, err
	}
	info, err := st.Info(ctx)
	if err != nil {
		return out, err
	}
	if info.State.Msgs == 0 {
		return out, nil
	}
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq; seq++ {
		m, err := st.GetMsg(ctx, seq)
		if err != nil {
			return out, err
		}
		var ce struct {
			ID   string `json:"id"`
			Data struct {
				Refit string `json:"refit"`
			} `json:"data"`
		}
		if err := json.Unmarshal(m.Data, &ce); err != nil {
			t.Fatalf("output %d: %v", seq, err)
		}
		out.ids[ce.ID]++
		if strings.HasSuffix(m.Subject, ".summary") {
			out.summaries[strings.Split(m.Subject, ".")[2]+"@"+ce.Data.Refit]++
		}
	}
	return out, nil
}

// waitSummaries waits until every category has a summary of refit.
func waitSummaries(t testing.TB, ctx context.Context, js jetstream.JetStream, ncat int, refit string) outputSummary {
	t.Helper()
	for {
		sctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		out, err := readOutput(t, sctx, js)
		cancel()
		n := 0
		for k := range out.summaries {
			if strings.HasSuffix(k, "@"+refit) {
				n++
			}
		}
		if err == nil && n == ncat {
			return out
		}
		select {
		case <-ctx.Done():
			t.Fatalf("%d of %d categories summarised refit %s (last error %v)", n, ncat, refit, err)
		case <-time.After(200 * time.Millisecond):
		}
	}
}

// TestClusterTakeover runs the real binary as three workers over a
// three-server NATS cluster (streams, consumers, claims and state on
// three replicas), 12 categories over 6 partitions, 3 refits. During the
// second refit it SIGKILLs one worker and shuts down the server leading
// the input stream. Every category must get exactly one summary per
// refit, no event id may be stored twice, the killed worker's partitions
// must be taken over within the claim TTL + 5 s, and the final mirrored
// snapshots must be bit-identical to a single worker's (one partition,
// its own server) on the same input.
func TestClusterTakeover(t *testing.T) {
	ncat, products, refits := 12, 8, 3
	if testing.Short() {
		products = 5
	}
	const ttl = 3 * time.Second
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	bin := buildBinary(t)
	input := clusterInput(ncat, products, refits)
	dir := t.TempDir()

	// The reference: one worker, one partition, an embedded-style single
	// server of its own.
	ref, err := stream.StartEmbedded(ctx, stream.EmbeddedConfig{StoreDir: t.TempDir(), Port: -1, NoLog: true}, nil)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(ref.Shutdown)
	refW := startWorker(t, bin, dir, "ref", ref.ClientURL())
	_, refJS := connectJS(t, ref.ClientURL())
	waitStream(t, ctx, refJS, "RIVALMIX_IN")
	for r := range refits {
		publishAll(t, ctx, refJS, input[r])
	}
	waitSummaries(t, ctx, refJS, ncat, fmt.Sprintf("2026-W%02d", 40+refits-1))
	refW.stop(t)
	want := map[string][]byte{}
	st, err := state.Open(filepath.Join(dir, "ref.db"), state.Options{ReadOnly: true, Timeout: 5 * time.Second})
	if err != nil {
		t.Fatal(err)
	}
	for i := range ncat {
		cat := fmt.Sprintf("cereal-%02d", i)
		if want[cat], err = st.Snapshot(cat); err != nil || want[cat] == nil {
			t.Fatalf("reference snapshot %s: %v", cat, err)
		}
	}
	st.Close()

	cl := startCluster(t)
	_, js := connectJS(t, cl.url())
	for {
		// JetStream answers once the servers have elected a meta leader.
		// Ready for the workers once a three-replica stream can be placed.
		actx, acancel := context.WithTimeout(ctx, 5*time.Second)
		_, err := js.CreateStream(actx, jetstream.StreamConfig{Name: "READY", Subjects: []string{"ready"}, Replicas: 3})
		if err == nil {
			err = js.DeleteStream(actx, "READY")
		}
		acancel()
		if err == nil {
			break
		}
		t.Logf("cluster not ready yet: %v", err)
		if ctx.Err() != nil {
			t.Fatalf("JetStream cluster not ready: %v", err)
		}
		time.Sleep(100 * time.Millisecond)
	}
	args := []string{"--partitions", "6", "--replicas", "3", "--claim-ttl", ttl.String()}
	var ws []*workerProc
	for i := range 3 {
		ws = append(ws, startWorker(t, bin, dir, fmt.Sprintf("w%d", i), cl.url(), args...))
	}
	waitStream(t, ctx, js, "RIVALMIX_IN")
	publishAll(t, ctx, js, input[0])
	waitSummaries(t, ctx, js, ncat, "2026-W40")
	// The claims spread: two partitions per live worker.
	for {
		sctx, cancel := context.WithTimeout(ctx, 5*time.Second)
		h, err := stream.ClaimHolders(sctx, js, stream.DefaultClaimBucket, 6)
		cancel()
		count := map[string]int{}
		for _, w := range h {
			count[w]++
		}
		if err == nil && count["w0"] == 2 && count["w1"] == 2 && count["w2"] == 2 {
			break
		}
		if ctx.Err() != nil {
			t.Fatalf("claims did not spread over the three workers: %v (err %v)", h, err)
		}
		time.Sleep(100 * time.Millisecond)
	}

	// Second refit: half of it, then the faults, then the rest.
	half := len(input[1]) / 2
	publishAll(t, ctx, js, input[1][:half])
	holders, err := stream.ClaimHolders(ctx, js, stream.DefaultClaimBucket, 6)
	if err != nil {
		t.Fatal(err)
	}
	victim := ws[1]
	var victimParts []int
	for p, h := range holders {
		if h == victim.name {
			victimParts = append(victimParts, p)
		}
	}
	info, err := mustStream(t, ctx, js, "RIVALMIX_IN").Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	leader := info.Cluster.Leader
	killed := time.Now()
	if err := victim.cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	for _, s := range cl.servers {
		if s.Name() == leader {
			s.Shutdown()
		}
	}
	t.Logf("killed %s holding partitions %v (holders %v); shut down %s, leader of RIVALMIX_IN", victim.name, victimParts, holders, leader)
	if len(victimParts) == 0 {
		t.Errorf("%s held no partition before it was killed; claims %v", victim.name, holders)
	}
	// Takeover: every partition held, none by the victim.
	var took time.Duration
	for {
		sctx, cancel := context.WithTimeout(ctx, 2*time.Second)
		h, err := stream.ClaimHolders(sctx, js, stream.DefaultClaimBucket, 6)
		cancel()
		if err == nil {
			ok := true
			for _, w := range h {
				ok = ok && w != "" && w != victim.name
			}
			if ok {
				took = time.Since(killed)
				break
			}
		}
		if ctx.Err() != nil {
			t.Fatalf("partitions of %s not taken over: %v (err %v)", victim.name, h, err)
		}
		time.Sleep(100 * time.Millisecond)
	}
	t.Logf("takeover of %s's partitions measured %s after SIGKILL (claim TTL %s)", victim.name, took.Round(10*time.Millisecond), ttl)
	if took > ttl+5*time.Second {
		t.Errorf("takeover took %s, want <= claim TTL %s + 5 s", took, ttl)
	}
	var status bytes.Buffer
	if err := runClusterStatus(ctx, []string{"--nats", cl.url()}, &status, &status); err != nil {
		t.Errorf("cluster-status: %v\n%s", err, status.String())
	}
	t.Logf("cluster-status after the takeover:\n%s", status.String())
	if strings.Contains(status.String(), "(free)") || strings.Contains(status.String(), " "+victim.name+" ") {
		t.Errorf("cluster-status shows a free partition or the killed worker holding one:\n%s", status.String())
	}
	publishAll(t, ctx, js, input[1][half:])
	waitSummaries(t, ctx, js, ncat, "2026-W41")
	publishAll(t, ctx, js, input[2])
	out := waitSummaries(t, ctx, js, ncat, "2026-W42")
	for _, w := range []*workerProc{ws[0], ws[2]} {
		w.stop(t)
	}
	out, err = readOutput(t, ctx, js)
	if err != nil {
		t.Fatal(err)
	}
	for i := range ncat {
		for r := range refits {
			k := fmt.Sprintf("cereal-%02d@2026-W%02d", i, 40+r)
			if out.summaries[k] != 1 {
				t.Errorf("%s: %d summaries, want 1", k, out.summaries[k])
			}
		}
	}
	for id, n := range out.ids {
		if n > 1 {
			t.Errorf("event %s stored %d times", id, n)
		}
	}
	m, err := stream.OpenMirrorReadOnly(ctx, js, stream.DefaultMirrorBucket)
	if err != nil {
		t.Fatal(err)
	}
	for cat, w := range want {
		cc, ok, err := m.Category(ctx, cat)
		if err != nil || !ok {
			t.Fatalf("mirrored %s: ok %v, err %v", cat, ok, err)
		}
		if !bytes.Equal(cc.Snapshot, w) {
			t.Errorf("category %s: mirrored snapshot (%d bytes) differs from the single worker's (%d bytes)", cat, len(cc.Snapshot), len(w))
		}
	}
	t.Logf("%d events, %d categories x %d refits; snapshot sizes e.g. %d bytes", len(out.ids), ncat, refits, len(want["cereal-00"]))
}

func mustStream(t *testing.T, ctx context.Context, js jetstream.JetStream, name string) jetstream.Stream {
	t.Helper()
	s, err := js.Stream(ctx, name)
	if err != nil {
		t.Fatalf("stream %s: %v", name, err)
	}
	return s
}

// waitStream waits until a worker has created the stream.
func waitStream(t testing.TB, ctx context.Context, js jetstream.JetStream, name string) {
	t.Helper()
	for {
		sctx, cancel := context.WithTimeout(ctx, 5*time.Second)
		_, err := js.Stream(sctx, name)
		cancel()
		if err == nil {
			return
		}
		select {
		case <-ctx.Done():
			t.Fatalf("stream %s never created", name)
		case <-time.After(100 * time.Millisecond):
		}
	}
}
