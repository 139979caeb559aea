package main

import (
	"strings"
	"testing"
)

// TestHelpListsDefaults: -h of each command prints its flags with their
// defaults, and no panic text from the flag package (which once showed
// for every flag, because it asked a zero wrapped value for its text).
func TestHelpListsDefaults(t *testing.T) {
	t.Parallel()
	for _, cmd := range []string{"serve", "demo", "fit", "replay", "simulate"} {
		_, stdout, stderr := runLine(t, cmd, "-h")
		out := stdout + stderr
		if strings.Contains(out, "panic") || !strings.Contains(out, "(default ") {
			t.Errorf("%s -h:\n%s", cmd, out)
		}
	}
	_, stdout, stderr := runLine(t, "serve", "-h")
	if !strings.Contains(stdout+stderr, "cosegment-limit") || !strings.Contains(stdout+stderr, "(default 2000)") {
		t.Errorf("serve -h lacks --cosegment-limit and its default:\n%s", stdout+stderr)
	}
}
