// Command rivalmix keeps a Bayesian segmentation of retail products by how
// the relative cross-price elasticities of their strongest competitors
// decay, and reports segment moves and probable missed competitors.
//
// Usage:
//
//	rivalmix <command> [flags]
//
// Commands:
//
//	serve     run the streaming service on NATS JetStream and a bbolt state file
//	demo      run the service, an embedded NATS server and a simulated category together
//	fit       fit a segmentation to a file of refit results (batch)
//	replay    run the service's update path over a file of refits and write the events
//	simulate  write or publish a fictional category's weekly refit results
//	inspect   print what a state file holds
//	cluster-status  print partition holders, lag and mirrored-state age
//	version   print the version this binary was built from
//
// Run "rivalmix <command> -h" for the flags of each command.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

// command is one subcommand: run parses args and does the work, writing
// results to stdout and progress and diagnostics to stderr.
type command struct {
	name, summary string
	run           func(ctx context.Context, args []string, stdout, stderr io.Writer) error
}

func commands() []command {
	return []command{
		{"serve", "run the streaming service on NATS JetStream and a bbolt state file", runServe},
		{"demo", "run the service, an embedded NATS server and a simulated category together", runDemo},
		{"fit", "fit a segmentation to a file of refit results (batch)", runFit},
		{"replay", "run the service's update path over a file of refits and write the events", runReplay},
		{"simulate", "write or publish a fictional category's weekly refit results", runSimulate},
		{"inspect", "print what a state file holds", runInspect},
		{"cluster-status", "print which worker holds which partition, its lag and the age of its mirrored state", runClusterStatus},
		{"version", "print the version this binary was built from", runVersion},
	}
}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

// run runs one command line and returns the exit status: 0, 1 for a
// failure, 2 for a command line that cannot be run as given. An error is
// printed first, then, for a mistake in the command line, one line
// pointing to the help.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	err := dispatch(ctx, args, stdout, stderr)
	var ue *usageError
	switch {
	case err == nil, errors.Is(err, flag.ErrHelp):
		return 0
	case errors.As(err, &ue):
		fmt.Fprintf(stderr, "rivalmix: %v\n%s\n", err, ue.hint())
		return 2
	}
	fmt.Fprintln(stderr, "rivalmix:", err)
	return 1
}

func dispatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		usage(stderr)
		return errors.New("no command given")
	}
	switch args[0] {
	case "-h", "--help", "-help", "help":
		usage(stdout)
		return nil
	case "--version", "-version", "-v":
		return runVersion(ctx, args[1:], stdout, stderr)
	}
	for _, c := range commands() {
		if c.name == args[0] {
			return c.run(ctx, args[1:], stdout, stderr)
		}
	}
	return &usageError{err: fmt.Errorf("unknown command %q", args[0])}
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "usage: rivalmix <command> [flags]")
	fmt.Fprintln(w, "\ncommands:")
	width := 0
	for _, c := range commands() {
		width = max(width, len(c.name))
	}
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-*s %s\n", width+1, c.name, c.summary)
	}
	fmt.Fprintln(w, "\nRun 'rivalmix <command> -h' for a command's flags; 'rivalmix --version' for the version.")
}
