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
	}
}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := dispatch(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	switch {
	case err == nil:
	case errors.Is(err, flag.ErrHelp):
	default:
		fmt.Fprintln(os.Stderr, "rivalmix:", err)
		os.Exit(1)
	}
}

func dispatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		usage(stderr)
		if len(args) == 0 {
			return errors.New("no command given")
		}
		return flag.ErrHelp
	}
	for _, c := range commands() {
		if c.name == args[0] {
			return c.run(ctx, args[1:], stdout, stderr)
		}
	}
	usage(stderr)
	return fmt.Errorf("unknown command %q", args[0])
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "usage: rivalmix <command> [flags]")
	fmt.Fprintln(w, "\ncommands:")
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-9s %s\n", c.name, c.summary)
	}
	fmt.Fprintln(w, "\nRun 'rivalmix <command> -h' for a command's flags.")
}

// newFlagSet returns a flag set that reports errors instead of exiting and
// prints a usage line, the command's summary and its flags with defaults.
func newFlagSet(name, synopsis, summary string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "usage: rivalmix %s %s\n\n%s\n\nflags:\n", name, synopsis, summary)
		fs.PrintDefaults()
	}
	return fs
}
