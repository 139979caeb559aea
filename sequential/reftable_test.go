package sequential

import (
	"encoding/csv"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// refDir holds the reference tables written by
// testdata/ref/gen_exponweib.py with Debian's SciPy; see that script's
// header for the version and the command.
const refDir = "../testdata/ref"

// refRow is one row of a reference table, addressed by column name.
type refRow struct {
	line int
	cols map[string]int
	rec  []string
}

// float returns the named column as a float64; a missing column or a
// malformed number fails the test, since the table is then unusable.
func (r refRow) float(t *testing.T, name string) float64 {
	t.Helper()
	v, err := strconv.ParseFloat(r.str(t, name), 64)
	if err != nil {
		t.Fatalf("line %d: column %s: %v", r.line, name, err)
	}
	return v
}

func (r refRow) int(t *testing.T, name string) int {
	t.Helper()
	v, err := strconv.Atoi(r.str(t, name))
	if err != nil {
		t.Fatalf("line %d: column %s: %v", r.line, name, err)
	}
	return v
}

func (r refRow) str(t *testing.T, name string) string {
	t.Helper()
	i, ok := r.cols[name]
	if !ok {
		t.Fatalf("line %d: no column %q", r.line, name)
	}
	return r.rec[i]
}

// floats parses a ';'-separated list of numbers; the empty string is an
// empty list.
func (r refRow) floats(t *testing.T, name string) []float64 {
	t.Helper()
	s := r.str(t, name)
	if s == "" {
		return nil
	}
	var out []float64
	for _, f := range strings.Split(s, ";") {
		v, err := strconv.ParseFloat(f, 64)
		if err != nil {
			t.Fatalf("line %d: column %s: %v", r.line, name, err)
		}
		out = append(out, v)
	}
	return out
}

// readRefTable reads a reference CSV: '#' comment lines, then a header
// row, then data rows. An empty table is an error: a check over no rows
// would pass silently.
func readRefTable(t *testing.T, name string) []refRow {
	t.Helper()
	f, err := os.Open(filepath.Join(refDir, name))
	if err != nil {
		t.Fatalf("reference table: %v", err)
	}
	t.Cleanup(func() { f.Close() })
	cr := csv.NewReader(f)
	cr.Comment = '#'
	header, err := cr.Read()
	if err != nil {
		t.Fatalf("%s: header: %v", name, err)
	}
	cols := make(map[string]int, len(header))
	for i, h := range header {
		cols[h] = i
	}
	var rows []refRow
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		line, _ := cr.FieldPos(0)
		rows = append(rows, refRow{line: line, cols: cols, rec: rec})
	}
	if len(rows) == 0 {
		t.Fatalf("%s: no data rows", name)
	}
	return rows
}

// relErr returns |got-want| / |want|, or |got-want| when want is 0.
func relErr(got, want float64) float64 {
	d := math.Abs(got - want)
	if want == 0 {
		return d
	}
	return d / math.Abs(want)
}

// closeRel reports whether got is within rel of want relatively, with an
// absolute floor abs for values near zero where a relative measure means
// nothing. Equal infinities are close; NaN is never close.
func closeRel(got, want, rel, abs float64) bool {
	if math.IsNaN(got) || math.IsNaN(want) {
		return false
	}
	if math.IsInf(want, 0) || math.IsInf(got, 0) {
		return got == want
	}
	return math.Abs(got-want) <= math.Max(rel*math.Abs(want), abs)
}
