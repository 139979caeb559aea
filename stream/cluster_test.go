package stream

import (
	"bytes"
	"context"
	"fmt"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// partitionedConfig is testServiceConfig with partitions, a short claim
// TTL and the worker's name.
func partitionedConfig(worker string, partitions int, ttl time.Duration) ServiceConfig {
	cfg := testServiceConfig()
	cfg.Bus.Partitions = partitions
	cfg.Claims.TTL = ttl
	cfg.Claims.Worker = worker
	return cfg
}

// summariesByCategory counts summary events per category and refit.
func summariesByCategory(t *testing.T, ctx context.Context, js jetstream.JetStream, streamName string) (map[string]int, map[string]int) {
	t.Helper()
	byID, count := outputEvents(t, ctx, js, streamName)
	sums := map[string]int{}
	for _, m := range byID {
		if !strings.HasSuffix(m.Subject, ".summary") {
			continue
		}
		kc := kindCounts(t, map[string]*jetstream.RawStreamMsg{"x": m})
		for k, n := range kc {
			if refit, ok := strings.CutPrefix(k, "summary@"); ok {
				cat := strings.Split(m.Subject, ".")[2]
				sums[cat+"@"+refit] += n
			}
		}
	}
	return sums, count
}

// checkInputOrder fails the test unless RIVALMIX_IN holds exactly the
// published messages in publish order: the reference worker reads them in
// that order, and a category's state depends on the order of its input.
func checkInputOrder(t *testing.T, ctx context.Context, js jetstream.JetStream, published []inputMsg) {
	t.Helper()
	stored := streamMessages(t, ctx, js, "RIVALMIX_IN")
	if len(stored) != len(published) {
		t.Fatalf("input stream holds %d messages, %d were published", len(stored), len(published))
	}
	for i, m := range stored {
		if !bytes.Equal(m.Data, published[i].data) {
			t.Fatalf("input stream seq %d (%s) is not message %d as published: the input order differs from the reference's", m.Sequence, m.Subject, i)
		}
	}
}

// TestPartitionedTakeover runs three partitioned workers on one server,
// 12 categories over 6 partitions, and crashes one of them between two
// refits: every category gets exactly one summary per refit, no event id
// is stored twice, the claims spread over the live workers, and the
// final mirrored snapshots are bit-identical to a single worker's (one
// partition, today's mode) on the same input.
func TestPartitionedTakeover(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 40*time.Second)
	defer cancel()
	srv := startTestServer(t)
	_, js := connectTest(t, srv.ClientURL())
	lg := newTestLog(t)
	const ncat, nparts = 12, 6
	ttl := 2 * time.Second
	var cats []*testCategory
	for i := range ncat {
		cats = append(cats, newTestCategory(fmt.Sprintf("cereal-%02d", i), 6, 100*i, uint64(7+i)))
	}
	// The reference: one worker, one partition, its own input stream.
	ref := withTag(testServiceConfig(), "ref")
	ref.Bus.InputStream = "REF_IN"
	ref.Bus.InputSubjects = "ref.in.>"
	refits := [][]inputMsg{refitMessages(0, cats...), refitMessages(1, cats...)}
	refMsgs := func(r int) []inputMsg {
		ms := refits[r]
		out := make([]inputMsg, len(ms))
		for i, m := range ms {
			out[i] = inputMsg{subject: "ref.in." + strings.TrimPrefix(m.subject, "rivalmix.in."), data: m.data}
		}
		return out
	}
	ensureStreams(t, ctx, js, ref)
	var refLast uint64
	for r := range 2 {
		refLast = publishInput(t, ctx, js, refMsgs(r))
	}
	refPath := filepath.Join(t.TempDir(), "ref.db")
	refIn := startInstance(t, srv.ClientURL(), refPath, ref, lg, instanceOptions{})
	if _, err := refIn.waitDone(ctx, refLast, nil); err != nil {
		t.Fatal(err)
	}
	if err := refIn.stop(); err != nil {
		t.Fatal(err)
	}
	want, _ := readState(t, refPath)

	// The input stream exists before anything is published to it, as
	// REF_IN does above: an asynchronous publish that finds no stream
	// yet is retried by the client after a wait, each on its own timer,
	// so the stream would store the messages in another order than the
	// reference's and every later comparison would be meaningless.
	if err := CreateStreams(ctx, js, partitionedConfig("setup", nparts, ttl).Bus); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	var ins []*instance
	for w := range 3 {
		cfg := partitionedConfig(fmt.Sprintf("w%d", w), nparts, ttl)
		ins = append(ins, startInstance(t, srv.ClientURL(), filepath.Join(dir, fmt.Sprintf("w%d.db", w)), cfg, lg, instanceOptions{}))
	}
	// Two bad inputs: one with no category (partition 0 takes those) and
	// one that breaks the input contract in a partitioned category.
	bad := []inputMsg{{subject: "rivalmix.in", data: []byte(`{"product":"P-1"}`)},
		{subject: "rivalmix.in." + cats[3].name, data: []byte(`{"product":`)}}
	published := append(append([]inputMsg{}, refits[0]...), bad...)
	publishInput(t, ctx, js, published)
	checkInputOrder(t, ctx, js, published)
	waitSummaries := func(refit string) {
		t.Helper()
		for {
			sums, _ := summariesByCategory(t, ctx, js, "RIVALMIX_OUT")
			n := 0
			for _, c := range cats {
				if sums[c.name+"@"+refit] > 0 {
					n++
				}
			}
			if n == ncat {
				return
			}
			if !Sleep(ctx, 100*time.Millisecond) {
				t.Fatalf("only %d of %d categories summarised refit %s", n, ncat, refit)
			}
		}
	}
	waitSummaries(refitName(0))
	// The claims spread over the three live workers within a few plans.
	held := map[string]int{}
	for spread := false; !spread; {
		spread = true
		for w, in := range ins {
			held[fmt.Sprintf("w%d", w)] = len(in.svc.claims.Held())
			spread = spread && len(in.svc.claims.Held()) == nparts/3
		}
		if !spread && !Sleep(ctx, 50*time.Millisecond) {
			t.Fatalf("claims did not spread over 3 workers: %v", held)
		}
	}
	// Crash w1: its connection drops without a goodbye, its leases expire.
	killed := time.Now()
	ins[1].nc.Close()
	ins[1].abandon()
	publishInput(t, ctx, js, refits[1])
	checkInputOrder(t, ctx, js, append(published, refits[1]...))
	waitSummaries(refitName(1))
	t.Logf("claims before the crash %v; refit after it fully summarised %s after the crash (claim TTL %s)", held, time.Since(killed).Round(time.Millisecond), ttl)
	if got := len(ins[0].svc.claims.Held()) + len(ins[2].svc.claims.Held()); got != nparts {
		t.Errorf("the two live workers hold %d partitions, want %d", got, nparts)
	}
	for _, i := range []int{0, 2} {
		if err := ins[i].stop(); err != nil {
			t.Fatal(err)
		}
	}
	sums, count := summariesByCategory(t, ctx, js, "RIVALMIX_OUT")
	for _, c := range cats {
		for r := range 2 {
			if n := sums[c.name+"@"+refitName(r)]; n != 1 {
				t.Errorf("category %s refit %s: %d summaries, want 1", c.name, refitName(r), n)
			}
		}
	}
	for id, n := range count {
		if n > 1 {
			t.Errorf("event %s stored %d times", id, n)
		}
	}
	rejected := map[string]int{}
	for _, m := range streamMessages(t, ctx, js, "RIVALMIX_REJECTED") {
		rejected[m.Subject]++
	}
	if want := map[string]int{"rivalmix.rejected._unknown": 1, "rivalmix.rejected." + cats[3].name: 1}; !reflect.DeepEqual(rejected, want) {
		t.Errorf("rejected stream holds %v, want %v", rejected, want)
	}
	m, err := OpenMirrorReadOnly(ctx, js, DefaultMirrorBucket)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range cats {
		cc, ok, err := m.Category(ctx, c.name)
		if err != nil || !ok {
			t.Fatalf("mirrored %s: ok %v err %v", c.name, ok, err)
		}
		if !bytes.Equal(cc.Snapshot, want[c.name]) {
			t.Errorf("category %s: mirrored snapshot (%d bytes) differs from the single worker's (%d bytes)", c.name, len(cc.Snapshot), len(want[c.name]))
		}
	}
}
