package main

import (
	"context"
	"fmt"
	"os"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/stream"
)

// BenchmarkIngestWorkers measures how ingest scales with partitioned
// workers: 1, 2 and 3 `rivalmix serve` processes, each held to one core
// (GOMAXPROCS=1), share 6 partitions of 2 categories each on one embedded
// server. The clock runs from the first input publish (after the claims
// have spread) to the last category's summary (seen in the output
// stream's per-subject counts). It reports product vectors per second,
// the workers' CPU seconds (user + system, from the kernel's accounting
// of each process) per vector, and the CPU seconds of this process (the
// NATS server, the publisher and the wait) over the run, which share the
// machine's cores with the workers. One iteration is one whole run, so
// run it with -benchtime 1x:
//
//	go test -run XXX -bench IngestWorkers -benchtime 1x ./cmd/rivalmix/
func BenchmarkIngestWorkers(b *testing.B) {
	bin := buildBinary(b)
	const ncat, products = 12, 150
	for _, workers := range []int{1, 2, 3} {
		b.Run(fmt.Sprintf("workers=%d", workers), func(b *testing.B) {
			for range b.N {
				vps, cpuPerVector, server := ingestRun(b, bin, workers, ncat, products)
				b.ReportMetric(vps, "vectors/s")
				b.ReportMetric(cpuPerVector*1e3, "cpu-ms/vector")
				b.ReportMetric(server.Seconds(), "server-cpu-s")
			}
		})
	}
}

func ingestRun(b *testing.B, bin string, workers, ncat, products int) (vectorsPerSec, cpuPerVector float64, server time.Duration) {
	b.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	srv, err := stream.StartEmbedded(ctx, stream.EmbeddedConfig{StoreDir: b.TempDir(), Port: -1, NoLog: true}, nil)
	if err != nil {
		b.Fatal(err)
	}
	defer srv.Shutdown()
	dir := b.TempDir()
	// Categories chosen so that every partition holds as many: the
	// server's hash puts cereal-00..11 into partitions of 1, 2, 2, 3, 3
	// and 1, so which partitions a worker happened to claim decided the
	// speed-up (1.5 to 1.75 with two workers) rather than the workers.
	bus := stream.DefaultBusConfig()
	bus.Partitions = 6
	var idx []int
	per := map[int]int{}
	for i := 0; len(idx) < ncat; i++ {
		if p := bus.CategoryPartition(fmt.Sprintf("cereal-%02d", i)); per[p] < ncat/bus.Partitions {
			per[p]++
			idx = append(idx, i)
		}
	}
	input := clusterInputOf(idx, products, 1)
	var ws []*workerProc
	for i := range workers {
		ws = append(ws, startWorkerEnv(b, []string{"GOMAXPROCS=1"}, bin, dir, fmt.Sprintf("w%d", i), srv.ClientURL(),
			"--partitions", "6", "--particles", "64", "--batch", "64", "--fetch", "256"))
	}
	_, js := connectJS(b, srv.ClientURL())
	waitStream(b, ctx, js, "RIVALMIX_IN")
	for {
		sctx, c := context.WithTimeout(ctx, 5*time.Second)
		h, err := stream.ClaimHolders(sctx, js, stream.DefaultClaimBucket, 6)
		c()
		count := map[string]int{}
		for _, w := range h {
			count[w]++
		}
		spread := err == nil && len(count) == workers && count[""] == 0
		for _, n := range count {
			spread = spread && n == 6/workers
		}
		if spread {
			break
		}
		if ctx.Err() != nil {
			b.Fatalf("claims did not spread: %v", h)
		}
		time.Sleep(100 * time.Millisecond)
	}
	vectors := 0
	for _, m := range input[0] {
		if !strings.Contains(m[1], `"complete":true`) {
			vectors++
		}
	}
	b.ResetTimer()
	cpu0 := processCPU(b, ws)
	self0 := selfCPU()
	t0 := time.Now()
	publishAll(b, ctx, js, input[0])
	waitSummaryCount(b, ctx, js, ncat)
	wall := time.Since(t0)
	cpu := processCPU(b, ws) - cpu0
	server = selfCPU() - self0
	b.StopTimer()
	for _, w := range ws {
		w.stop(b)
	}
	return float64(vectors) / wall.Seconds(), cpu.Seconds() / float64(vectors), server
}

// selfCPU returns the user and system CPU time of this process.
func selfCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// processCPU sums the user and system CPU time the kernel has charged to
// the worker processes so far (/proc/<pid>/stat fields 14 and 15, in
// clock ticks of 1/100 s, the USER_HZ of Linux on every common
// architecture).
func processCPU(b *testing.B, ws []*workerProc) time.Duration {
	b.Helper()
	var total time.Duration
	for _, w := range ws {
		raw, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", w.cmd.Process.Pid))
		if err != nil {
			b.Fatalf("%s: %v", w.name, err)
		}
		// The command name (field 2) is in parentheses and may hold
		// spaces; the fields counted from 3 follow the last ')'.
		rest := string(raw[strings.LastIndexByte(string(raw), ')')+2:])
		f := strings.Fields(rest)
		utime, err1 := strconv.ParseInt(f[11], 10, 64)
		stime, err2 := strconv.ParseInt(f[12], 10, 64)
		if err1 != nil || err2 != nil {
			b.Fatalf("%s: /proc stat fields: %v %v", w.name, err1, err2)
		}
		total += time.Duration(utime+stime) * 10 * time.Millisecond
	}
	return total
}

// waitSummaryCount waits until ncat categories have a summary event, from
// the output stream's per-subject counts: one request per poll. (Reading
// every event back, as the cluster test's checks do, cost the server and
// this process 2-5 CPU seconds per run on the cores the workers share,
// which capped the measured speed-up of two workers.)
func waitSummaryCount(b *testing.B, ctx context.Context, js jetstream.JetStream, ncat int) {
	b.Helper()
	st, err := js.Stream(ctx, "RIVALMIX_OUT")
	if err != nil {
		b.Fatal(err)
	}
	for {
		info, err := st.Info(ctx, jetstream.WithSubjectFilter("rivalmix.out.*.summary"))
		if err == nil && len(info.State.Subjects) >= ncat {
			return
		}
		select {
		case <-ctx.Done():
			b.Fatalf("summaries of %d categories: %v (last error %v)", ncat, ctx.Err(), err)
		case <-time.After(100 * time.Millisecond):
		}
	}
}
