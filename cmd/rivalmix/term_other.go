//go:build !(linux || darwin || dragonfly || freebsd || netbsd || openbsd)

package main

import "os"

// isTerminal reports false where we have no terminal check: the demo
// then exits after its last refit unless run with --hold.
func isTerminal(*os.File) bool { return false }
