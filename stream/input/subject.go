package input

import (
	"fmt"
	"strings"
)

// DefaultInputPrefix is the subject prefix of input messages; the category
// is the single token that follows it ("rivalmix.in.<category>").
const DefaultInputPrefix = "rivalmix.in"

// CategoryFromSubject returns the category of an input subject
// "<prefix>.<category>"; an empty prefix means [DefaultInputPrefix]. The
// category must be a single NATS token of 1..128 bytes from [A-Za-z0-9_-].
// A subject that breaks this is an [*InputError] with Field "subject"
// whose rule quotes the subject; an invalid prefix is a plain error.
func CategoryFromSubject(subject, prefix string) (string, error) {
	if prefix == "" {
		prefix = DefaultInputPrefix
	}
	for _, tok := range strings.Split(prefix, ".") {
		if tok == "" || strings.ContainsAny(tok, "*> \t\r\n") {
			return "", fmt.Errorf("input: subject prefix %q is not a literal NATS subject", prefix)
		}
	}
	bad := func(rule string) error {
		return &InputError{Field: "subject", Rule: fmt.Sprintf("%q %s", clip(subject), rule)}
	}
	cat, ok := strings.CutPrefix(subject, prefix+".")
	switch {
	case subject == prefix:
		return "", bad(fmt.Sprintf("names no category; publish each category's messages to %s.<category>", prefix))
	case !ok:
		return "", bad(fmt.Sprintf("does not start with %q", prefix+"."))
	case cat == "":
		return "", bad("has no category token")
	case strings.Contains(cat, "."):
		return "", bad("has more than one token after the prefix; the category must be a single token")
	case len(cat) > maxNameBytes:
		return "", bad(fmt.Sprintf("has a category longer than %d bytes", maxNameBytes))
	}
	for i := range len(cat) {
		c := cat[i]
		if !('a' <= c && c <= 'z' || 'A' <= c && c <= 'Z' || '0' <= c && c <= '9' || c == '_' || c == '-') {
			return "", bad(fmt.Sprintf("has a category with byte %q; only letters, digits, '_' and '-' are allowed", c))
		}
	}
	return cat, nil
}
