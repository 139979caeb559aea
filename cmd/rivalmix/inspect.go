package main

import (
	"context"
	"errors"
	"io"

	"rivalmix/state"
)

// runInspect prints what a state file holds.
func runInspect(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("inspect", "--state FILE",
		"Prints the categories, products, segments, outbox size and input position held in a state file.\n"+
			"The file is opened read-only; a running service holds its lock, so stop it first.", stderr)
	file := fs.String("state", "rivalmix.db", "bbolt state file")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if *file == "" {
		return errors.New("inspect: --state is required")
	}
	st, err := state.Open(*file, state.Options{ReadOnly: true})
	if err != nil {
		return err
	}
	defer st.Close()
	return st.Inspect(stdout)
}
