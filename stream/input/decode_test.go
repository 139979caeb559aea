package input_test

import (
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strings"
	"testing"
	"testing/iotest"

	"rivalmix/stream/input"
)

// The products, refits and values below belong to an invented retailer.

type validCase struct {
	name    string
	payload string
	opt     input.DecodeOptions // zero value: the defaults
	want    input.Message       // Hash is checked separately
}

func validCases() []validCase {
	strict := input.DecodeOptions{Strict: true}
	return []validCase{
		{
			name:    "form A, sorted descending",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.31,0.94,0.52]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.94, 0.52, 0.31}},
		},
		{
			name:    "form A, default L",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[0.5]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.5}},
		},
		{
			name:    "form A, L from options",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[0.5]}`,
			opt:     input.DecodeOptions{DefaultCompetitors: 7},
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 7,
				Relative: []float64{0.5}},
		},
		{
			name:    "form A, whole-number spellings of L",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":1.2e1,"relative":[0.5]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 12,
				Relative: []float64{0.5}},
		},
		{
			name:    "form A, ids stay aligned when sorting",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":5,"relative":[0.2,0.9,0.4],"ids":["P-0071","P-2210","P-3307"]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 5,
				Relative: []float64{0.9, 0.4, 0.2}, IDs: []string{"P-2210", "P-3307", "P-0071"}},
		},
		{
			name:    "form A, ties ordered by id",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[0.4,0.4],"ids":["P-9","P-1"]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.4, 0.4}, IDs: []string{"P-1", "P-9"}},
		},
		{
			name:    "form A, non-positive entries dropped with their ids",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[0.3,-0.2,0,0.8],"ids":["P-1","P-2","P-3","P-4"]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.8, 0.3}, IDs: []string{"P-4", "P-1"},
				Dropped: []input.DroppedEntry{{ID: "P-3", Value: 0}, {ID: "P-2", Value: -0.2}}},
		},
		{
			name:    "form A, dropped without ids, -0 folded to 0",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[-0.5,0.6,-0]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.6}, Dropped: []input.DroppedEntry{{Value: 0}, {Value: -0.5}}},
		},
		{
			name:    "form A, everything dropped leaves n = 0",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[-0.1,0]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{}, Dropped: []input.DroppedEntry{{Value: 0}, {Value: -0.1}}},
		},
		{
			name:    "form A, empty list is n = 0",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":3,"relative":[]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 3,
				Relative: []float64{}},
		},
		{
			name:    "form A, as many entries as competitors",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":2,"relative":[0.1,0.2]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 2,
				Relative: []float64{0.2, 0.1}},
		},
		{
			name:    "form A, strict mode accepts positive entries",
			payload: `{"product":"P-1042","refit":"2026-W48","relative":[0.7,1.1]}`,
			opt:     strict,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{1.1, 0.7}},
		},
		{
			name: "form A, pretty-printed with keys in another order",
			payload: "{\n  \"relative\": [ 0.52 , 0.94 ],\r\n\t\"refit\": \"2026-W48\",\n" +
				"  \"product\": \"P-1042\"\n}\n",
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.94, 0.52}},
		},
		{
			name:    "form A, non-ASCII printable id",
			payload: `{"product":"P-1042-\u00e9t\u00e9","refit":"2026-W48","relative":[0.5]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042-été", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{0.5}},
		},
		{
			name:    "form B, relative computed from own",
			payload: `{"product":"P-1042","refit":"2026-W48","own":-2.4,"cross":[{"id":"P-0071","value":0.8},{"id":"P-2210","value":2.1}]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{2.1 / 2.4, 0.8 / 2.4}, IDs: []string{"P-2210", "P-0071"}, Own: -2.4},
		},
		{
			name:    "form B, complement dropped in relative units",
			payload: `{"product":"P-1042","refit":"2026-W48","competitors":4,"own":-2,"cross":[{"value":-0.5,"id":"P-0071"},{"id":"P-2210","value":1.5}]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 4,
				Relative: []float64{0.75}, IDs: []string{"P-2210"}, Own: -2,
				Dropped: []input.DroppedEntry{{ID: "P-0071", Value: -0.25}}},
		},
		{
			name:    "form B, empty list",
			payload: `{"product":"P-1042","refit":"2026-W48","own":-1.3,"cross":[]}`,
			want: input.Message{Kind: input.KindDatum, Product: "P-1042", Refit: "2026-W48", Competitors: 10,
				Relative: []float64{}, IDs: []string{}, Own: -1.3},
		},
		{
			name:    "refit complete with expected",
			payload: `{"refit":"2026-W48","complete":true,"expected":275}`,
			want:    input.Message{Kind: input.KindRefitComplete, Refit: "2026-W48", Expected: 275},
		},
		{
			name:    "refit complete without expected",
			payload: `{"complete":true,"refit":"2026-W48"}`,
			want:    input.Message{Kind: input.KindRefitComplete, Refit: "2026-W48"},
		},
		{
			name:    "withdrawn",
			payload: `{"product":"P-1042","withdrawn":true}`,
			want:    input.Message{Kind: input.KindWithdrawn, Product: "P-1042"},
		},
		{
			name:    "withdrawn with refit",
			payload: `{"product":"P-1042","withdrawn":true,"refit":"2026-W49"}`,
			want:    input.Message{Kind: input.KindWithdrawn, Product: "P-1042", Refit: "2026-W49"},
		},
	}
}

func TestDecodeValid(t *testing.T) {
	t.Parallel()
	for _, tc := range validCases() {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			got, err := input.Decode([]byte(tc.payload), tc.opt)
			if err != nil {
				t.Fatalf("Decode: %v", err)
			}
			checkMessage(t, got, tc.want)
		})
	}
}

// relTol bounds the disagreement between a decoded value and the expected
// one written as a Go expression: both are at most one rounded division
// away from the same real number, so they agree to a few ulps; 1e-12
// relative is far looser than that and far tighter than any real mistake.
const relTol = 1e-12

func closeTo(a, b float64) bool {
	return math.Abs(a-b) <= relTol*math.Max(math.Abs(a), math.Abs(b))
}

func checkMessage(t *testing.T, got, want input.Message) {
	t.Helper()
	if got.Kind != want.Kind || got.Product != want.Product || got.Refit != want.Refit ||
		got.Competitors != want.Competitors || got.Expected != want.Expected || !closeTo(got.Own, want.Own) {
		t.Errorf("got kind=%v product=%q refit=%q L=%d expected=%d own=%g,\nwant kind=%v product=%q refit=%q L=%d expected=%d own=%g",
			got.Kind, got.Product, got.Refit, got.Competitors, got.Expected, got.Own,
			want.Kind, want.Product, want.Refit, want.Competitors, want.Expected, want.Own)
	}
	if (got.Relative == nil) != (want.Relative == nil) || !slices.EqualFunc(got.Relative, want.Relative, closeTo) {
		t.Errorf("Relative = %#v, want %#v", got.Relative, want.Relative)
	}
	if (got.IDs == nil) != (want.IDs == nil) || !slices.Equal(got.IDs, want.IDs) {
		t.Errorf("IDs = %#v, want %#v", got.IDs, want.IDs)
	}
	sameDropped := func(a, b input.DroppedEntry) bool { return a.ID == b.ID && closeTo(a.Value, b.Value) }
	if !slices.EqualFunc(got.Dropped, want.Dropped, sameDropped) {
		t.Errorf("Dropped = %+v, want %+v", got.Dropped, want.Dropped)
	}
	for _, d := range got.Dropped {
		if math.Signbit(d.Value) && d.Value == 0 {
			t.Errorf("Dropped holds -0; it must be folded to 0 so equal content hashes equally")
		}
	}
	if got.Hash == ([32]byte{}) {
		t.Error("Hash is zero")
	}
}

type rejectCase struct {
	name    string
	payload string
	opt     input.DecodeOptions // zero value: the defaults
	field   string              // want InputError.Field
	rule    string              // substring of InputError.Rule; empty to skip
}

func rejectCases() []rejectCase {
	long := strings.Repeat("P", 129)
	strict := input.DecodeOptions{Strict: true}
	eleven := `[0.9,0.8,0.7,0.6,0.5,0.4,0.3,0.2,0.1,0.05,0.01]`
	return []rejectCase{
		// The message as a whole.
		{"too large", `{"product":"P-1042","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{MaxBytes: 20}, "", "larger than the limit of 20 bytes"},
		{"empty payload", ``, input.DecodeOptions{}, "", "empty payload"},
		{"only whitespace", " \n\t", input.DecodeOptions{}, "", "empty payload"},
		{"not JSON", `product=P-1042`, input.DecodeOptions{}, "", "not valid JSON"},
		{"truncated", `{"product":"P-1042","refit":`, input.DecodeOptions{}, "", "not valid JSON"},
		{"bad nested syntax", `{"product":"P-1042","relative":[0.5,]}`, input.DecodeOptions{}, "", "not valid JSON"},
		{"invalid UTF-8", "{\"product\":\"P-\xff\",\"refit\":\"2026-W48\",\"relative\":[]}", input.DecodeOptions{}, "", "UTF-8"},
		{"array", `[0.94,0.52]`, input.DecodeOptions{}, "", "must be a JSON object, not an array"},
		{"string", `"P-1042"`, input.DecodeOptions{}, "", "must be a JSON object, not a string"},
		{"null", `null`, input.DecodeOptions{}, "", "must be a JSON object, not null"},
		{"trailing object", `{"product":"P-1042","withdrawn":true} {}`, input.DecodeOptions{}, "", "trailing data"},
		{"trailing garbage", `{"product":"P-1042","withdrawn":true}x`, input.DecodeOptions{}, "", "trailing data"},

		// Fields of every message.
		{"unknown field", `{"product":"P-1042","refit":"2026-W48","relative":[],"colour":"red"}`, input.DecodeOptions{}, "colour", "unknown field"},
		{"unknown field with a long name is clipped", `{"` + strings.Repeat("x", 500) + `":1}`, input.DecodeOptions{}, strings.Repeat("x", 64) + "...", "unknown field"},
		{"field names are case sensitive", `{"Product":"P-1042","refit":"2026-W48","relative":[]}`, input.DecodeOptions{}, "Product", "unknown field"},
		{"duplicate field", `{"product":"P-1042","refit":"2026-W48","relative":[],"product":"P-7"}`, input.DecodeOptions{}, "product", "more than once"},
		{"product missing", `{"refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "required"},
		{"product empty", `{"product":"","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "must not be empty"},
		{"product too long", `{"product":"` + long + `","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "at most 128 bytes"},
		{"product with space", `{"product":"P 1042","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "no whitespace"},
		{"product with control", `{"product":"P-1042\u0007","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "printable"},
		{"product lone surrogate", `{"product":"P-\ud800","refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "printable"},
		{"product a number", `{"product":1042,"refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "must be a string, not a number"},
		{"product null", `{"product":null,"refit":"2026-W48","relative":[0.5]}`, input.DecodeOptions{}, "product", "not null"},
		{"refit missing", `{"product":"P-1042","relative":[0.5]}`, input.DecodeOptions{}, "refit", "required"},
		{"refit with tab", `{"product":"P-1042","refit":"2026\tW48","relative":[0.5]}`, input.DecodeOptions{}, "refit", "no whitespace"},

		// Competitors.
		{"competitors a string", `{"product":"P-1042","refit":"2026-W48","competitors":"ten","relative":[0.5]}`, input.DecodeOptions{}, "competitors", "must be a number, not a string"},
		{"competitors fractional", `{"product":"P-1042","refit":"2026-W48","competitors":2.5,"relative":[0.5]}`, input.DecodeOptions{}, "competitors", "whole number"},
		{"competitors zero", `{"product":"P-1042","refit":"2026-W48","competitors":0,"relative":[]}`, input.DecodeOptions{}, "competitors", "between 1 and 1000"},
		{"competitors negative", `{"product":"P-1042","refit":"2026-W48","competitors":-3,"relative":[]}`, input.DecodeOptions{}, "competitors", "between 1 and 1000"},
		{"competitors too many", `{"product":"P-1042","refit":"2026-W48","competitors":1001,"relative":[]}`, input.DecodeOptions{}, "competitors", "between 1 and 1000"},
		{"competitors overflow", `{"product":"P-1042","refit":"2026-W48","competitors":1e400,"relative":[]}`, input.DecodeOptions{}, "competitors", "finite"},
		{"more relative than competitors", `{"product":"P-1042","refit":"2026-W48","competitors":2,"relative":[0.5,0.4,0.3]}`, input.DecodeOptions{}, "relative", "more entries (3) than competitors considered (2)"},
		{"more relative than default L", `{"product":"P-1042","refit":"2026-W48","relative":` + eleven + `}`, input.DecodeOptions{}, "relative", "more entries (11) than competitors considered (10)"},
		{"non-positive entries count toward L", `{"product":"P-1042","refit":"2026-W48","competitors":1,"relative":[0.5,-0.1]}`, input.DecodeOptions{}, "relative", "more entries (2) than competitors considered (1)"},
		{"more cross than competitors", `{"product":"P-1042","refit":"2026-W48","competitors":1,"own":-2,"cross":[{"id":"P-1","value":1},{"id":"P-2","value":0.5}]}`, input.DecodeOptions{}, "cross", "more entries (2) than competitors considered (1)"},

		// Form A.
		{"neither relative nor cross", `{"product":"P-1042","refit":"2026-W48"}`, input.DecodeOptions{}, "relative", "give \"relative\" or \"cross\""},
		{"both relative and cross", `{"product":"P-1042","refit":"2026-W48","relative":[0.5],"own":-2,"cross":[]}`, input.DecodeOptions{}, "cross", "not allowed together"},
		{"relative not an array", `{"product":"P-1042","refit":"2026-W48","relative":0.5}`, input.DecodeOptions{}, "relative", "must be an array, not a number"},
		{"relative null", `{"product":"P-1042","refit":"2026-W48","relative":null}`, input.DecodeOptions{}, "relative", "not null"},
		{"relative entry a string", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,"0.4"]}`, input.DecodeOptions{}, "relative[1]", "must be a number, not a string"},
		{"relative entry null", `{"product":"P-1042","refit":"2026-W48","relative":[null]}`, input.DecodeOptions{}, "relative[0]", "not null"},
		{"relative entry overflows", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,0.4,1e400]}`, input.DecodeOptions{}, "relative[2]", "must be a finite number"},
		{"relative entry overflows negative", `{"product":"P-1042","refit":"2026-W48","relative":[-1e400]}`, input.DecodeOptions{}, "relative[0]", "must be a finite number"},
		{"relative with own", `{"product":"P-1042","refit":"2026-W48","own":-2,"relative":[0.5]}`, input.DecodeOptions{}, "own", "only allowed with \"cross\""},
		{"ids length mismatch", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,0.4],"ids":["P-1"]}`, input.DecodeOptions{}, "ids", "has 1 entries but \"relative\" has 2"},
		{"ids not an array", `{"product":"P-1042","refit":"2026-W48","relative":[0.5],"ids":"P-1"}`, input.DecodeOptions{}, "ids", "must be an array"},
		{"ids entry empty", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,0.4],"ids":["P-1",""]}`, input.DecodeOptions{}, "ids[1]", "must not be empty"},
		{"ids entry a number", `{"product":"P-1042","refit":"2026-W48","relative":[0.5],"ids":[2210]}`, input.DecodeOptions{}, "ids[0]", "must be a string"},
		{"ids repeated", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,0.4,0.3],"ids":["P-1","P-2","P-1"]}`, input.DecodeOptions{}, "ids[2]", "repeats the id of ids[0]"},
		{"ids with cross", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[],"ids":[]}`, input.DecodeOptions{}, "ids", "only allowed with \"relative\""},
		{"strict rejects zero", `{"product":"P-1042","refit":"2026-W48","relative":[0.5,0]}`, strict, "relative[1]", "must be positive"},
		{"strict rejects complement", `{"product":"P-1042","refit":"2026-W48","relative":[-0.2,0.5]}`, strict, "relative[0]", "must be positive"},

		// Form B.
		{"cross without own", `{"product":"P-1042","refit":"2026-W48","cross":[{"id":"P-1","value":1}]}`, input.DecodeOptions{}, "own", "required with \"cross\""},
		{"own positive", `{"product":"P-1042","refit":"2026-W48","own":2.4,"cross":[]}`, input.DecodeOptions{}, "own", "must be negative"},
		{"own zero", `{"product":"P-1042","refit":"2026-W48","own":0,"cross":[]}`, input.DecodeOptions{}, "own", "must be negative"},
		{"own negative zero", `{"product":"P-1042","refit":"2026-W48","own":-0.0,"cross":[]}`, input.DecodeOptions{}, "own", "must be negative"},
		{"own a string", `{"product":"P-1042","refit":"2026-W48","own":"-2.4","cross":[]}`, input.DecodeOptions{}, "own", "must be a number"},
		{"own overflows", `{"product":"P-1042","refit":"2026-W48","own":-1e999,"cross":[]}`, input.DecodeOptions{}, "own", "finite"},
		{"cross not an array", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":{"id":"P-1","value":1}}`, input.DecodeOptions{}, "cross", "must be an array, not an object"},
		{"cross entry not an object", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[1.5]}`, input.DecodeOptions{}, "cross[0]", "must be an object, not a number"},
		{"cross entry unknown field", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1,"weight":3}]}`, input.DecodeOptions{}, "cross[0].weight", "unknown field"},
		{"cross entry duplicate field", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1,"value":2}]}`, input.DecodeOptions{}, "cross[0].value", "more than once"},
		{"cross entry without id", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1},{"value":0.5}]}`, input.DecodeOptions{}, "cross[1].id", "required"},
		{"cross entry without value", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1"}]}`, input.DecodeOptions{}, "cross[0].value", "required"},
		{"cross value a string", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":"1.2"}]}`, input.DecodeOptions{}, "cross[0].value", "must be a number, not a string"},
		{"cross value overflows", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1e400}]}`, input.DecodeOptions{}, "cross[0].value", "finite"},
		{"cross ratio overflows", `{"product":"P-1042","refit":"2026-W48","own":-1e-300,"cross":[{"id":"P-1","value":1e300}]}`, input.DecodeOptions{}, "cross[0].value", "value/|own| is not a finite number"},
		{"cross ratio underflows", `{"product":"P-1042","refit":"2026-W48","own":-1e300,"cross":[{"id":"P-1","value":1e-300}]}`, input.DecodeOptions{}, "cross[0].value", "underflows"},
		{"cross id repeated", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1},{"id":"P-1","value":0.5}]}`, input.DecodeOptions{}, "cross[1].id", "repeats the id of cross[0]"},
		{"cross id with space", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P 1","value":1}]}`, input.DecodeOptions{}, "cross[0].id", "no whitespace"},
		{"strict rejects cross complement", `{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-1","value":1},{"id":"P-2","value":-0.3}]}`, strict, "cross[1].value", "must be positive"},

		// Control messages.
		{"complete false", `{"refit":"2026-W48","complete":false}`, input.DecodeOptions{}, "complete", "must be true"},
		{"complete a string", `{"refit":"2026-W48","complete":"yes"}`, input.DecodeOptions{}, "complete", "must be true, not a string"},
		{"complete without refit", `{"complete":true,"expected":3}`, input.DecodeOptions{}, "refit", "required"},
		{"complete with product", `{"product":"P-1042","refit":"2026-W48","complete":true}`, input.DecodeOptions{}, "product", "not allowed in a refit-complete message"},
		{"complete with relative", `{"refit":"2026-W48","complete":true,"relative":[0.5]}`, input.DecodeOptions{}, "relative", "not allowed in a refit-complete message"},
		{"complete and withdrawn", `{"product":"P-1042","refit":"2026-W48","complete":true,"withdrawn":true}`, input.DecodeOptions{}, "withdrawn", "not allowed in a refit-complete message"},
		{"expected negative", `{"refit":"2026-W48","complete":true,"expected":-1}`, input.DecodeOptions{}, "expected", "between 0 and"},
		{"expected fractional", `{"refit":"2026-W48","complete":true,"expected":27.5}`, input.DecodeOptions{}, "expected", "whole number"},
		{"expected too large", `{"refit":"2026-W48","complete":true,"expected":1e12}`, input.DecodeOptions{}, "expected", "between 0 and"},
		{"expected a string", `{"refit":"2026-W48","complete":true,"expected":"275"}`, input.DecodeOptions{}, "expected", "must be a number"},
		{"expected in a datum", `{"product":"P-1042","refit":"2026-W48","relative":[0.5],"expected":3}`, input.DecodeOptions{}, "expected", "not allowed in a datum"},
		{"withdrawn false", `{"product":"P-1042","withdrawn":false}`, input.DecodeOptions{}, "withdrawn", "must be true"},
		{"withdrawn without product", `{"refit":"2026-W48","withdrawn":true}`, input.DecodeOptions{}, "product", "required"},
		{"withdrawn with relative", `{"product":"P-1042","withdrawn":true,"relative":[0.5]}`, input.DecodeOptions{}, "relative", "not allowed in a withdrawal message"},
		{"withdrawn with expected", `{"product":"P-1042","withdrawn":true,"expected":1}`, input.DecodeOptions{}, "expected", "not allowed in a withdrawal message"},
		{"withdrawn with bad refit", `{"product":"P-1042","withdrawn":true,"refit":""}`, input.DecodeOptions{}, "refit", "must not be empty"},
	}
}

func TestDecodeRejects(t *testing.T) {
	t.Parallel()
	for _, tc := range rejectCases() {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			m, err := input.Decode([]byte(tc.payload), tc.opt)
			if err == nil {
				t.Fatalf("Decode accepted %q as %+v", tc.payload, m)
			}
			var ie *input.InputError
			if !errors.As(err, &ie) {
				t.Fatalf("error %v (%T) is not an *InputError", err, err)
			}
			if !errors.Is(err, input.ErrInvalidInput) {
				t.Errorf("errors.Is(%v, ErrInvalidInput) = false", err)
			}
			if ie.Field != tc.field {
				t.Errorf("Field = %q, want %q (error: %v)", ie.Field, tc.field, err)
			}
			if !strings.Contains(ie.Rule, tc.rule) {
				t.Errorf("Rule = %q, want it to contain %q", ie.Rule, tc.rule)
			}
			if m.Kind != 0 || m.Hash != ([32]byte{}) {
				t.Errorf("Decode returned a non-zero Message with its error: %+v", m)
			}
		})
	}
}

func TestInputErrorMessage(t *testing.T) {
	t.Parallel()
	tests := []struct {
		err  *input.InputError
		want string
	}{
		{&input.InputError{Field: "relative[2]", Rule: "must be a finite number"}, `field "relative[2]": must be a finite number`},
		{&input.InputError{Rule: "empty payload"}, "message: empty payload"},
	}
	for _, tc := range tests {
		if got := tc.err.Error(); got != tc.want {
			t.Errorf("Error() = %q, want %q", got, tc.want)
		}
		if !errors.Is(tc.err, input.ErrInvalidInput) {
			t.Errorf("%v does not match ErrInvalidInput", tc.err)
		}
	}
}

func TestDecodeOptions(t *testing.T) {
	t.Parallel()
	def := input.DefaultDecodeOptions()
	if def.DefaultCompetitors != 10 || def.MaxBytes != 64<<10 || def.Strict {
		t.Errorf("DefaultDecodeOptions() = %+v, want L 10, 64 KiB, not strict", def)
	}
	if err := def.Validate(); err != nil {
		t.Errorf("defaults do not validate: %v", err)
	}
	for _, bad := range []input.DecodeOptions{{DefaultCompetitors: -1}, {DefaultCompetitors: 1001}, {MaxBytes: -5}} {
		if err := bad.Validate(); err == nil {
			t.Errorf("Validate(%+v) = nil, want an error", bad)
		}
		_, err := input.Decode([]byte(`{"product":"P-1042","withdrawn":true}`), bad)
		if err == nil || errors.Is(err, input.ErrInvalidInput) {
			t.Errorf("Decode with options %+v: error %v, want an options error that is not ErrInvalidInput", bad, err)
		}
	}
}

func TestKindString(t *testing.T) {
	t.Parallel()
	for k, want := range map[input.Kind]string{
		input.KindDatum: "datum", input.KindRefitComplete: "refit-complete",
		input.KindWithdrawn: "withdrawn", input.Kind(9): "Kind(9)",
	} {
		if got := k.String(); got != want {
			t.Errorf("Kind(%d).String() = %q, want %q", int(k), got, want)
		}
	}
}

func mustDecode(t *testing.T, payload string, opt input.DecodeOptions) input.Message {
	t.Helper()
	m, err := input.Decode([]byte(payload), opt)
	if err != nil {
		t.Fatalf("Decode(%s): %v", payload, err)
	}
	return m
}

func TestDecodeHashSameContent(t *testing.T) {
	t.Parallel()
	tests := []struct {
		name string
		a, b string
		opt  input.DecodeOptions
	}{
		{"key order and whitespace",
			`{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,0.31]}`,
			"{ \"relative\" : [0.94, 0.52, 0.31],\n\t\"competitors\":10, \"refit\":\"2026-W48\", \"product\":\"P-1042\" }\r\n", input.DecodeOptions{}},
		{"entry order with ids",
			`{"product":"P-1042","refit":"2026-W48","relative":[0.5,0.9,-0.1],"ids":["P-1","P-2","P-3"]}`,
			`{"product":"P-1042","refit":"2026-W48","relative":[-0.1,0.9,0.5],"ids":["P-3","P-2","P-1"]}`, input.DecodeOptions{}},
		{"number spelling",
			`{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.5,0.25,-0]}`,
			`{"product":"P-1042","refit":"2026-W48","competitors":1e1,"relative":[5e-1,2.50E-1,0.0]}`, input.DecodeOptions{}},
		{"default L spelled out",
			`{"product":"P-1042","refit":"2026-W48","relative":[0.5]}`,
			`{"product":"P-1042","refit":"2026-W48","competitors":8,"relative":[0.5]}`, input.DecodeOptions{DefaultCompetitors: 8}},
		{"form B equals form A",
			`{"product":"P-1042","refit":"2026-W48","own":-2,"cross":[{"id":"P-2210","value":1.5},{"id":"P-0071","value":-0.5}]}`,
			`{"product":"P-1042","refit":"2026-W48","relative":[-0.25,0.75],"ids":["P-0071","P-2210"]}`, input.DecodeOptions{}},
		{"cross entry key order",
			`{"product":"P-1042","refit":"2026-W48","own":-2.4,"cross":[{"id":"P-2210","value":2.1}]}`,
			`{"cross":[{"value":2.1,"id":"P-2210"}],"own":-2.4,"refit":"2026-W48","product":"P-1042"}`, input.DecodeOptions{}},
		{"refit complete",
			`{"refit":"2026-W48","complete":true,"expected":275}`,
			`{"expected":275.0,"complete":true,"refit":"2026-W48"}`, input.DecodeOptions{}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			a, b := mustDecode(t, tc.a, tc.opt), mustDecode(t, tc.b, tc.opt)
			if a.Hash != b.Hash {
				t.Errorf("hashes differ for the same content:\n%s\n%s", tc.a, tc.b)
			}
		})
	}
}

func TestDecodeHashDifferentContent(t *testing.T) {
	t.Parallel()
	base := `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.1],"ids":["P-1","P-2","P-3"]}`
	others := map[string]string{
		"value":          `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.53,-0.1],"ids":["P-1","P-2","P-3"]}`,
		"dropped value":  `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.2],"ids":["P-1","P-2","P-3"]}`,
		"ids":            `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.1],"ids":["P-2","P-1","P-3"]}`,
		"dropped id":     `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.1],"ids":["P-1","P-2","P-4"]}`,
		"no ids":         `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.1]}`,
		"competitors":    `{"product":"P-1042","refit":"2026-W48","competitors":11,"relative":[0.94,0.52,-0.1],"ids":["P-1","P-2","P-3"]}`,
		"product":        `{"product":"P-1043","refit":"2026-W48","competitors":10,"relative":[0.94,0.52,-0.1],"ids":["P-1","P-2","P-3"]}`,
		"refit":          `{"product":"P-1042","refit":"2026-W49","competitors":10,"relative":[0.94,0.52,-0.1],"ids":["P-1","P-2","P-3"]}`,
		"entry dropped":  `{"product":"P-1042","refit":"2026-W48","competitors":10,"relative":[0.94,0.52],"ids":["P-1","P-2"]}`,
		"withdrawn":      `{"product":"P-1042","refit":"2026-W48","withdrawn":true}`,
		"complete":       `{"refit":"2026-W48","complete":true}`,
		"complete count": `{"refit":"2026-W48","complete":true,"expected":1}`,
	}
	seen := map[[32]byte]string{mustDecode(t, base, input.DecodeOptions{}).Hash: "base"}
	for name, payload := range others {
		h := mustDecode(t, payload, input.DecodeOptions{}).Hash
		if prev, dup := seen[h]; dup {
			t.Errorf("%q and %q hash the same", name, prev)
		}
		seen[h] = name
	}
}

// decoded is one DecodeLines callback, message or error, in call order.
type decoded struct {
	line    int
	product string // for a message
	field   string // for an error: InputError.Field
	err     bool
}

func collectLines(t *testing.T, text string, opt input.DecodeOptions) ([]decoded, error) {
	t.Helper()
	var got []decoded
	err := input.DecodeLines(strings.NewReader(text), opt,
		func(line int, m input.Message) error {
			got = append(got, decoded{line: line, product: m.Product})
			return nil
		},
		func(le *input.LineError) error {
			var ie *input.InputError
			if !errors.As(le, &ie) {
				t.Errorf("line %d: error %v is not an *InputError", le.Line, le.Err)
			}
			if !strings.HasPrefix(le.Error(), fmt.Sprintf("line %d: ", le.Line)) {
				t.Errorf("LineError.Error() = %q, want the line number first", le.Error())
			}
			got = append(got, decoded{line: le.Line, field: ie.Field, err: true})
			return nil
		})
	return got, err
}

func TestDecodeLines(t *testing.T) {
	t.Parallel()
	text := strings.Join([]string{
		"# refit 2026-W48 of an invented pet-food category", // 1
		"", // 2
		`{"product":"P-1042","refit":"2026-W48","relative":[0.94,0.52]}`, // 3
		"   \t", // 4
		`{"product":"P-2210","refit":"2026-W48","relative":"high"}`,    // 5
		`{"product":"P-0071","refit":"2026-W48","relative":[]}` + "\r", // 6
		"  # an indented comment",                                      // 7
		"{not json",                                                    // 8
		`{"refit":"2026-W48","complete":true,"expected":2}`,            // 9, no final newline
	}, "\n")
	got, err := collectLines(t, text, input.DecodeOptions{})
	if err != nil {
		t.Fatalf("DecodeLines: %v", err)
	}
	want := []decoded{
		{line: 3, product: "P-1042"},
		{line: 5, field: "relative", err: true},
		{line: 6, product: "P-0071"},
		{line: 8, field: "", err: true},
		{line: 9},
	}
	if !slices.Equal(got, want) {
		t.Errorf("DecodeLines calls:\n got %+v\nwant %+v", got, want)
	}
}

func TestDecodeLinesLongLine(t *testing.T) {
	t.Parallel()
	// The long line is far past bufio's default 4096-byte buffer, so the
	// reader has to stitch and then skip several chunks.
	long := `{"product":"P-1042","refit":"2026-W48","relative":[` + strings.Repeat("0.1,", 3000) + `0.1]}`
	comment := "#" + strings.Repeat("x", 9000)
	text := comment + "\n" + long + "\r\n" + `{"product":"P-2210","withdrawn":true}` + "\n"
	got, err := collectLines(t, text, input.DecodeOptions{MaxBytes: 200})
	if err != nil {
		t.Fatalf("DecodeLines: %v", err)
	}
	want := []decoded{{line: 2, field: "", err: true}, {line: 3, product: "P-2210"}}
	if !slices.Equal(got, want) {
		t.Errorf("DecodeLines calls:\n got %+v\nwant %+v", got, want)
	}
}

func TestDecodeLinesStops(t *testing.T) {
	t.Parallel()
	text := `{"product":"P-1042","withdrawn":true}` + "\n" + `{"product":1}` + "\n" + `{"product":"P-2210","withdrawn":true}` + "\n"
	noop := func(int, input.Message) error { return nil }

	t.Run("onErr aborts", func(t *testing.T) {
		t.Parallel()
		errAbort := errors.New("strict run aborted")
		var calls int
		err := input.DecodeLines(strings.NewReader(text), input.DecodeOptions{},
			func(int, input.Message) error { calls++; return nil },
			func(le *input.LineError) error { return fmt.Errorf("%w at %v", errAbort, le) })
		if !errors.Is(err, errAbort) {
			t.Errorf("DecodeLines = %v, want the onErr error", err)
		}
		if calls != 1 {
			t.Errorf("fn called %d times, want 1 (stop at line 2)", calls)
		}
	})
	t.Run("nil onErr returns the LineError", func(t *testing.T) {
		t.Parallel()
		err := input.DecodeLines(strings.NewReader(text), input.DecodeOptions{}, noop, nil)
		var le *input.LineError
		if !errors.As(err, &le) || le.Line != 2 || !errors.Is(err, input.ErrInvalidInput) {
			t.Errorf("DecodeLines = %v, want a *LineError for line 2 wrapping ErrInvalidInput", err)
		}
	})
	t.Run("fn aborts", func(t *testing.T) {
		t.Parallel()
		errFull := errors.New("worker queue full")
		err := input.DecodeLines(strings.NewReader(text), input.DecodeOptions{},
			func(int, input.Message) error { return errFull }, nil)
		if !errors.Is(err, errFull) {
			t.Errorf("DecodeLines = %v, want the fn error", err)
		}
	})
	t.Run("read error", func(t *testing.T) {
		t.Parallel()
		errDisk := errors.New("disk unreadable")
		r := io.MultiReader(strings.NewReader(`{"product":"P-1042","withdrawn":true}`+"\n"), iotest.ErrReader(errDisk))
		var lines []int
		err := input.DecodeLines(r, input.DecodeOptions{},
			func(line int, _ input.Message) error { lines = append(lines, line); return nil }, nil)
		if !errors.Is(err, errDisk) || errors.Is(err, input.ErrInvalidInput) {
			t.Errorf("DecodeLines = %v, want the read error", err)
		}
		if !slices.Equal(lines, []int{1}) {
			t.Errorf("decoded lines %v before the read error, want [1]", lines)
		}
	})
	t.Run("bad options", func(t *testing.T) {
		t.Parallel()
		err := input.DecodeLines(strings.NewReader(text), input.DecodeOptions{MaxBytes: -1}, noop, nil)
		if err == nil || errors.Is(err, input.ErrInvalidInput) {
			t.Errorf("DecodeLines = %v, want an options error", err)
		}
	})
	t.Run("empty input", func(t *testing.T) {
		t.Parallel()
		if err := input.DecodeLines(strings.NewReader(""), input.DecodeOptions{}, noop, nil); err != nil {
			t.Errorf("DecodeLines(empty) = %v", err)
		}
	})
}

func TestCategoryFromSubject(t *testing.T) {
	t.Parallel()
	tests := []struct {
		subject, prefix string
		want            string
		rule            string // substring of the error; empty when valid
	}{
		{subject: "rivalmix.in.pet-food", want: "pet-food"},
		{subject: "rivalmix.in.Snacks_2", prefix: "rivalmix.in", want: "Snacks_2"},
		{subject: "shop.eu.in.dairy", prefix: "shop.eu.in", want: "dairy"},
		{subject: "rivalmix.out.pet-food", rule: `does not start with "rivalmix.in."`},
		{subject: "rivalmix.in", rule: "names no category; publish each category's messages to rivalmix.in.<category>"},
		{subject: "rivalmix.in.", rule: "no category token"},
		{subject: "rivalmix.in.pet.food", rule: "more than one token"},
		{subject: "rivalmix.in.pet food", rule: "only letters, digits"},
		{subject: "rivalmix.in.*", rule: "only letters, digits"},
		{subject: "rivalmix.in.caf\u00e9", rule: "only letters, digits"},
		{subject: "rivalmix.in." + strings.Repeat("c", 129), rule: "longer than 128 bytes"},
	}
	for _, tc := range tests {
		t.Run(tc.subject, func(t *testing.T) {
			t.Parallel()
			got, err := input.CategoryFromSubject(tc.subject, tc.prefix)
			if tc.rule == "" {
				if err != nil || got != tc.want {
					t.Errorf("CategoryFromSubject(%q, %q) = %q, %v; want %q", tc.subject, tc.prefix, got, err, tc.want)
				}
				return
			}
			var ie *input.InputError
			if !errors.As(err, &ie) || ie.Field != "subject" {
				t.Fatalf("CategoryFromSubject(%q) error = %v, want an *InputError on field subject", tc.subject, err)
			}
			if !strings.Contains(ie.Rule, tc.rule) || !strings.Contains(err.Error(), clipForTest(tc.subject)) {
				t.Errorf("error %q, want it to name the subject and contain %q", err, tc.rule)
			}
		})
	}
	for _, prefix := range []string{"rivalmix.*", "rivalmix..in", ">"} {
		_, err := input.CategoryFromSubject("rivalmix.in.pet-food", prefix)
		if err == nil || errors.Is(err, input.ErrInvalidInput) {
			t.Errorf("prefix %q: error %v, want a configuration error", prefix, err)
		}
	}
}

// clipForTest is the part of a subject an error message always quotes.
func clipForTest(s string) string { return s[:min(len(s), 40)] }

func ExampleDecode() {
	payload := []byte(`{"product":"P-1042","refit":"2026-W48","own":-2.5,
		"cross":[{"id":"P-0071","value":0.5},{"id":"P-2210","value":2},{"id":"P-3307","value":-0.25}]}`)
	m, err := input.Decode(payload, input.DefaultDecodeOptions())
	if err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(m.Kind, m.Product, m.Refit, "L =", m.Competitors)
	fmt.Println(m.Relative, m.IDs)
	fmt.Printf("%+v\n", m.Dropped)

	_, err = input.Decode([]byte(`{"product":"P-1042","refit":"2026-W48","relative":[0.9,"0.4"]}`), input.DefaultDecodeOptions())
	fmt.Println(err)
	// Output:
	// datum P-1042 2026-W48 L = 10
	// [0.8 0.2] [P-2210 P-0071]
	// [{ID:P-3307 Value:-0.1}]
	// field "relative[1]": must be a number, not a string
}
