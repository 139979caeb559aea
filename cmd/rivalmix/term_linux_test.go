package main

import (
	"fmt"
	"os"
	"testing"

	"golang.org/x/sys/unix"
)

// openTerminal opens a new pseudo-terminal and returns its terminal end,
// a real tty as a user's shell would give the demo.
func openTerminal(t *testing.T) *os.File {
	t.Helper()
	ptmx, err := os.OpenFile("/dev/ptmx", os.O_RDWR, 0)
	if err != nil {
		t.Fatalf("open /dev/ptmx: %v", err)
	}
	t.Cleanup(func() { ptmx.Close() })
	if err := unix.IoctlSetPointerInt(int(ptmx.Fd()), unix.TIOCSPTLCK, 0); err != nil {
		t.Fatalf("unlock the pseudo-terminal: %v", err)
	}
	n, err := unix.IoctlGetInt(int(ptmx.Fd()), unix.TIOCGPTN)
	if err != nil {
		t.Fatalf("pseudo-terminal number: %v", err)
	}
	tty, err := os.OpenFile(fmt.Sprintf("/dev/pts/%d", n), os.O_RDWR|unix.O_NOCTTY, 0)
	if err != nil {
		t.Fatalf("open /dev/pts/%d: %v", n, err)
	}
	t.Cleanup(func() { tty.Close() })
	return tty
}

// TestDemoHoldsOnTerminal: with stdout a terminal the demo holds by
// default, and --exit overrides it.
func TestDemoHoldsOnTerminal(t *testing.T) {
	t.Parallel()
	tty := openTerminal(t)
	if !isTerminal(tty) {
		t.Fatal("isTerminal is false on a pseudo-terminal")
	}
	if got, err := demoHolds(false, false, tty); err != nil || !got {
		t.Errorf("demoHolds on a terminal = %v, %v; want true", got, err)
	}
	if got, err := demoHolds(false, true, tty); err != nil || got {
		t.Errorf("demoHolds on a terminal with --exit = %v, %v; want false", got, err)
	}
}
