package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/stream"
)

// runClusterStatus prints which worker holds which partition, each
// partition's lag and the age of its mirrored state.
func runClusterStatus(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("cluster-status", "--nats URL [flags]",
		"Prints, for every partition of the input stream, the worker holding its lease, the input messages\n"+
			"its consumer has not acked yet (lag), the mirrored input position and the age of the mirrored state.", stderr)
	url := fs.String("nats", "127.0.0.1:4222", "NATS server URL (a comma-separated list is allowed)")
	var conn stream.ConnectOptions
	connFlags(fs, &conn)
	envUsage(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := applyEnv(fs); err != nil {
		return err
	}
	cctx, cancel := context.WithTimeout(ctx, 15*time.Second)
	defer cancel()
	conn.Name = "rivalmix-cluster-status"
	lg, err := newLogger("error", os.Stderr)
	if err != nil {
		return err
	}
	nc, err := stream.Connect(cctx, *url, conn, lg)
	if err != nil {
		return err
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		return fmt.Errorf("jetstream: %w", err)
	}
	st, err := stream.ClusterStatus(cctx, js, stream.DefaultServiceConfig(), time.Now())
	if err != nil {
		return err
	}
	tw := tabwriter.NewWriter(stdout, 0, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "partition\tholder\tlag\tposition\tcategories\tsnapshot age\tmirrored by")
	for _, p := range st {
		holder, lag, age := p.Holder, fmt.Sprint(p.Lag), "-"
		if holder == "" {
			holder = "(free)"
		}
		if p.Lag < 0 {
			lag = "-"
		}
		if p.Worker != "" {
			age = p.SnapshotAge.Round(time.Second).String()
		}
		fmt.Fprintf(tw, "%d\t%s\t%s\t%d\t%d\t%s\t%s\n", p.Partition, holder, lag, p.Position, p.Categories, age, p.Worker)
	}
	return tw.Flush()
}
