package category

import "strings"

// CompareIDs orders product ids the way a person reads them: runs of
// digits compare by their numeric value, so P-2 comes before P-10; other
// characters compare byte by byte. Ids that differ only in leading zeros
// (P-07, P-7) fall back to the plain string order, so the order is total.
func CompareIDs(a, b string) int {
	i, j := 0, 0
	for i < len(a) && j < len(b) {
		if isDigit(a[i]) && isDigit(b[j]) {
			ea, eb := digitsEnd(a, i), digitsEnd(b, j)
			na := strings.TrimLeft(a[i:ea], "0")
			nb := strings.TrimLeft(b[j:eb], "0")
			if len(na) != len(nb) {
				if len(na) < len(nb) {
					return -1
				}
				return 1
			}
			if c := strings.Compare(na, nb); c != 0 {
				return c
			}
			i, j = ea, eb
			continue
		}
		if a[i] != b[j] {
			if a[i] < b[j] {
				return -1
			}
			return 1
		}
		i++
		j++
	}
	switch {
	case len(a)-i < len(b)-j:
		return -1
	case len(a)-i > len(b)-j:
		return 1
	}
	return strings.Compare(a, b)
}

func isDigit(c byte) bool { return '0' <= c && c <= '9' }

// digitsEnd returns the end of the run of digits that starts at s[i].
func digitsEnd(s string, i int) int {
	for i < len(s) && isDigit(s[i]) {
		i++
	}
	return i
}
