package main

import (
	"context"
	"io"
	"os"
)

// runServe runs the durable streaming service until SIGINT or SIGTERM.
func runServe(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("serve", "[flags]",
		"Runs the streaming service: consumes refit results from rivalmix.in.<category> on NATS JetStream,\n"+
			"keeps every category's segmentation current in a bbolt state file, and publishes segment moves,\n"+
			"missed-competitor alerts and refit summaries to rivalmix.out.<category>.<kind>. With no --nats URL\n"+
			"it starts an embedded NATS server. Stop it with SIGINT or SIGTERM: it finishes the batch in hand,\n"+
			"commits, acks and publishes what it committed.", stderr)
	var f serviceFlags
	f.register(fs, "rivalmix.db", "127.0.0.1:4222")
	envUsage(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if err := applyEnv(fs); err != nil {
		return err
	}
	lg, err := newLogger(f.logLevel, os.Stderr)
	if err != nil {
		return err
	}
	sc, err := f.serviceConfig()
	if err != nil {
		return err
	}
	r, err := start(ctx, &f, sc, lg)
	if err != nil {
		return err
	}
	defer r.close()
	lg.Info("serving", "state", absPath(f.stateFile), "nats", r.natsURL, "http", httpURL(r))
	return r.run(ctx)
}

func httpURL(r *running) string {
	if r.httpLn == nil {
		return ""
	}
	return "http://" + r.httpLn.Addr().String() + "/"
}
