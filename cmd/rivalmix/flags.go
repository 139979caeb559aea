package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"time"

	"rivalmix/stream"
)

// usageError is a command line that cannot be run as given: an unknown
// command or flag, a flag value of the wrong type, a stray argument, a
// required flag left out. It is printed with one line pointing to the
// help instead of the whole usage.
type usageError struct {
	cmd string // "" for the command itself
	err error
}

func (e *usageError) Error() string { return e.err.Error() }
func (e *usageError) Unwrap() error { return e.err }

func (e *usageError) hint() string {
	if e.cmd == "" {
		return "Run 'rivalmix -h' for the commands."
	}
	return fmt.Sprintf("Run 'rivalmix %s -h' for its flags.", e.cmd)
}

// newFlagSet returns a flag set for a command whose -h prints a usage
// line, the command's summary and its flags with defaults.
func newFlagSet(name, synopsis, summary string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(fs.Output(), "usage: rivalmix %s %s\n\n%s\n\nflags:\n", name, synopsis, summary)
		fs.PrintDefaults()
	}
	return fs
}

// usageErrorf returns a usageError of fs's command.
func usageErrorf(fs *flag.FlagSet, format string, a ...any) error {
	return &usageError{cmd: fs.Name(), err: fmt.Errorf(fs.Name()+": "+format, a...)}
}

// parseFlags parses args into fs: -h prints the command's help; any other
// mistake (an unknown flag, a value of the wrong type, an argument that
// is not a flag) is a usageError naming it, without the help text.
// Environment variables are not read here (see applyEnv).
func parseFlags(fs *flag.FlagSet, args []string) error {
	fs.VisitAll(func(f *flag.Flag) { f.Value = typedValue{f.Value} })
	out := fs.Output()
	fs.SetOutput(io.Discard) // the flag package would print the whole usage with each error
	err := fs.Parse(args)
	fs.SetOutput(out)
	switch {
	case errors.Is(err, flag.ErrHelp):
		fs.Usage()
		return err
	case err != nil:
		return &usageError{cmd: fs.Name(), err: fmt.Errorf("%s: %w", fs.Name(), err)}
	case fs.NArg() > 0:
		return usageErrorf(fs, "unexpected argument %q: give every value with its flag, e.g. --state FILE", fs.Arg(0))
	}
	return nil
}

// typedValue is a flag value whose Set error says which type the value
// must have, in words, instead of Go's "parse error".
type typedValue struct{ flag.Value }

// Set sets the value or says what was wanted.
func (v typedValue) Set(s string) error {
	if err := v.Value.Set(s); err != nil {
		if want := wantedType(v.Value); want != "" {
			return errors.New("want " + want)
		}
		return err
	}
	return nil
}

// String returns the wrapped value's text; the flag package also calls
// it on a zero typedValue (to tell a default from the zero value), which
// wraps nothing.
func (v typedValue) String() string {
	if v.Value == nil {
		return ""
	}
	return v.Value.String()
}

// IsBoolFlag lets a wrapped boolean flag be given without a value.
func (v typedValue) IsBoolFlag() bool {
	b, ok := v.Value.(interface{ IsBoolFlag() bool })
	return ok && b.IsBoolFlag()
}

// Get returns the wrapped value's Get.
func (v typedValue) Get() any {
	if g, ok := v.Value.(flag.Getter); ok {
		return g.Get()
	}
	return nil
}

// wantedType describes the values a flag takes, or "" for free text.
func wantedType(v flag.Value) string {
	g, ok := v.(flag.Getter)
	if !ok {
		return ""
	}
	switch g.Get().(type) {
	case int, int64:
		return "a whole number, like 256"
	case uint, uint64:
		return "a whole number >= 0, like 7"
	case float64:
		return "a number, like 0.25"
	case bool:
		return "true or false"
	case time.Duration:
		return "a duration with its unit, like 200ms, 30s or 10m"
	}
	return ""
}

// connFlags registers the NATS connection flags (credentials, NKey, user
// and password, token, TLS) that serve, demo and simulate share.
func connFlags(fs *flag.FlagSet, o *stream.ConnectOptions) {
	fs.StringVar(&o.CredsFile, "creds", "", "NATS user credentials file")
	fs.StringVar(&o.NKeyFile, "nkey", "", "NATS NKey seed file")
	fs.StringVar(&o.User, "user", "", "NATS user name")
	fs.StringVar(&o.Password, "password", "", "NATS password")
	fs.StringVar(&o.Token, "token", "", "NATS token")
	fs.StringVar(&o.TLSCert, "tls-cert", "", "client certificate (PEM) for NATS TLS")
	fs.StringVar(&o.TLSKey, "tls-key", "", "client key (PEM) for NATS TLS")
	fs.StringVar(&o.TLSCA, "tls-ca", "", "root CAs (PEM) to verify the NATS server")
}
