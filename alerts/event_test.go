package alerts

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"math"
	"reflect"
	"strings"
	"testing"
	"time"

	"rivalmix/sequential"
)

var fixedTime = time.Date(2026, 11, 30, 6, 0, 0, 0, time.UTC)

// eventRun evaluates three hand-built refits that produce every kind of
// event, and returns each refit's CloudEvents, one JSON line per event.
func eventRun(t *testing.T) [][]byte {
	t.Helper()
	cfg := DefaultConfig()
	refits := []Refit{
		handRefit(t, "2026-W46", 2, concat(members("a", 4, 0), members("b", 4, 1), []hand{{id: "x", seg: 1, p: 0.7}})),
		handRefit(t, "2026-W47", 3, concat(members("a", 4, 0), members("b", 2, 1), members("g", 2, 2), []hand{{id: "x", seg: 0, p: 0.2}})),
		handRefit(t, "2026-W48", 1, concat(members("a", 4, 0), members("b", 2, 0), members("g", 2, 0), []hand{{id: "x", seg: 0, p: 0.9}})),
	}
	mem := Memory{}
	var out [][]byte
	for _, r := range refits {
		o := mustEvaluate(t, cfg, mem, r)
		var buf bytes.Buffer
		for _, e := range o.Events {
			b, err := e.CloudEvent(DefaultCloudEventConfig(), fixedTime)
			if err != nil {
				t.Fatal(err)
			}
			buf.Write(b)
			buf.WriteByte('\n')
		}
		mj, err := json.Marshal(o.Memory)
		if err != nil {
			t.Fatal(err)
		}
		buf.Write(mj)
		out = append(out, buf.Bytes())
		mem = o.Memory
	}
	return out
}

func TestEventsByteIdentical(t *testing.T) {
	t.Parallel()
	a, b := eventRun(t), eventRun(t)
	for i := range a {
		if !bytes.Equal(a[i], b[i]) {
			t.Errorf("refit %d: events differ between identical runs:\n%s\n---\n%s", i, a[i], b[i])
		}
	}
	all := string(bytes.Join(a, nil))
	for _, typ := range []string{"segment.born", "segment.retired", "segment.split",
		"segment.merged", "segment.moved", "competitor.missed",
		"competitor.cleared", "refit.summary"} {
		if !strings.Contains(all, `"type":"`+DefaultTypePrefix+"."+typ+`"`) {
			t.Errorf("no %s event in the run", typ)
		}
	}
}

// TestEventOrderIgnoresProductOrder: the events depend on the products,
// not on the order the particle system keeps them in.
func TestEventOrderIgnoresProductOrder(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	prods := concat(members("a", 4, 0), members("b", 4, 1), []hand{{id: "x", seg: 1, p: 0.7}})
	rev := make([]hand, len(prods))
	for i, h := range prods {
		rev[len(prods)-1-i] = h
	}
	w1 := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, prods))
	w1r := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, rev))
	// Compared as JSON, what consumers see: an undefined Float (the ARI
	// of a first refit) is NaN, which reflect.DeepEqual never matches.
	a, err := json.Marshal(w1.Events)
	if err != nil {
		t.Fatal(err)
	}
	b, err := json.Marshal(w1r.Events)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(a, b) || !reflect.DeepEqual(w1.Memory, w1r.Memory) {
		t.Errorf("events or memory depend on product order:\n%s\n%s", a, b)
	}
}

func TestEvaluateLeavesMemoryAlone(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	w1 := mustEvaluate(t, cfg, Memory{}, handRefit(t, "W1", 2, concat(members("a", 4, 0), members("b", 4, 1), []hand{{id: "x", seg: 1, p: 0.7}})))
	before, err := json.Marshal(w1.Memory)
	if err != nil {
		t.Fatal(err)
	}
	mustEvaluate(t, cfg, w1.Memory, handRefit(t, "W2", 1, concat(members("a", 4, 0), members("b", 4, 0))))
	after, err := json.Marshal(w1.Memory)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(before, after) {
		t.Errorf("Evaluate changed its input memory:\n%s\n%s", before, after)
	}
	// The JSON form round-trips to the same bytes.
	var back Memory
	if err := json.Unmarshal(before, &back); err != nil {
		t.Fatal(err)
	}
	again, err := json.Marshal(back)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(before, again) {
		t.Errorf("memory JSON does not round-trip:\n%s\n%s", before, again)
	}
}

// TestEventID recomputes an id by hand from the documented layout:
// uvarint length + bytes of each field (all shorter than 128 bytes here,
// so each length is one byte).
func TestEventID(t *testing.T) {
	t.Parallel()
	var raw []byte
	for _, s := range []string{"breakfast-cereal", "2026-W48", "moved", "P-1042"} {
		raw = append(raw, byte(len(s)))
		raw = append(raw, s...)
	}
	sum := sha256.Sum256(raw)
	want := hex.EncodeToString(sum[:])[:32]
	if got := EventID("breakfast-cereal", "2026-W48", KindMoved, "P-1042"); got != want {
		t.Errorf("EventID = %s, want %s", got, want)
	}
	// Moving a byte between fields changes the id.
	if EventID("ab", "c", KindMoved, "x") == EventID("a", "bc", KindMoved, "x") {
		t.Error("ids of (ab, c) and (a, bc) collide")
	}
}

func TestCloudEventEnvelope(t *testing.T) {
	t.Parallel()
	e := NewEvent("breakfast-cereal", "2026-W48", KindMoved, "P-1042",
		Moved{Category: "breakfast-cereal", Refit: "2026-W48", Product: "P-1042", From: "S1", To: "S3", FromMembership: 0.2, ToMembership: 0.75})
	cfg := CloudEventConfig{Source: "https://pricing.larkfield.example/rivalmix/", TypePrefix: "example.larkfield.pricing"}
	b, err := e.CloudEvent(cfg, time.Date(2026, 11, 30, 7, 0, 0, 0, time.FixedZone("CET", 3600)))
	if err != nil {
		t.Fatal(err)
	}
	want := `{"specversion":"1.0","id":"` + e.ID + `","source":"https://pricing.larkfield.example/rivalmix/breakfast-cereal",` +
		`"type":"example.larkfield.pricing.segment.moved","subject":"P-1042","time":"2026-11-30T06:00:00Z",` +
		`"datacontenttype":"application/json","data":{"category":"breakfast-cereal","refit":"2026-W48",` +
		`"product":"P-1042","from":"S1","to":"S3","from_membership":0.2,"to_membership":0.75}}`
	if string(b) != want {
		t.Errorf("CloudEvent:\n got %s\nwant %s", b, want)
	}
	if got := e.NATSSubject(DefaultSubjectPrefix); got != "rivalmix.out.breakfast-cereal.moved" {
		t.Errorf("NATSSubject = %s", got)
	}
	if got := e.NATSSubject("acme.events"); got != "acme.events.breakfast-cereal.moved" {
		t.Errorf("NATSSubject with prefix = %s", got)
	}

	def := DefaultCloudEventConfig()
	for name, bad := range map[string]CloudEventConfig{
		"empty source":         {TypePrefix: DefaultTypePrefix},
		"relative source":      {Source: "/rivalmix", TypePrefix: DefaultTypePrefix},
		"source with a query":  {Source: "https://pricing.example/rivalmix?x=1", TypePrefix: DefaultTypePrefix},
		"one-label type":       {Source: DefaultSource, TypePrefix: "rivalmix"},
		"type with a space":    {Source: DefaultSource, TypePrefix: "com.example.rival mix"},
		"type with empty part": {Source: DefaultSource, TypePrefix: "com..rivalmix"},
	} {
		if _, err := e.CloudEvent(bad, fixedTime); !errors.Is(err, ErrEvent) {
			t.Errorf("%s: %v, want ErrEvent", name, err)
		}
	}
	nan := NewEvent("c", "r", KindMissed, "p", Missed{Probability: math.NaN()})
	if _, err := nan.CloudEvent(def, fixedTime); !errors.Is(err, ErrEvent) {
		t.Errorf("NaN body: %v, want ErrEvent", err)
	}
	unknown := NewEvent("c", "r", Kind("teleported"), "p", nil)
	if _, err := unknown.CloudEvent(def, fixedTime); !errors.Is(err, ErrEvent) {
		t.Errorf("unknown kind: %v, want ErrEvent", err)
	}
	if _, err := e.CloudEvent(def, time.Time{}); !errors.Is(err, ErrEvent) {
		t.Errorf("zero time: %v, want ErrEvent (every event carries a time)", err)
	}
	if got := def.SourceOf("breakfast-cereal"); got != "urn:rivalmix:breakfast-cereal" {
		t.Errorf("default source of breakfast-cereal = %s", got)
	}
}

func TestConfigValidate(t *testing.T) {
	t.Parallel()
	if err := DefaultConfig().Validate(); err != nil {
		t.Fatal(err)
	}
	for name, mut := range map[string]func(*Config){
		"move_in":        func(c *Config) { c.MoveIn = 0 },
		"move_out":       func(c *Config) { c.MoveOut = 0.6 },
		"threshold":      func(c *Config) { c.Threshold = math.NaN() },
		"alert_prob":     func(c *Config) { c.AlertProb = 1.5 },
		"realert_margin": func(c *Config) { c.RealertMargin = 0 },
		"split_share":    func(c *Config) { c.SplitShare = 0.6 },
	} {
		c := DefaultConfig()
		mut(&c)
		err := c.Validate()
		if !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), name) {
			t.Errorf("%s: %v, want ErrConfig naming %s", name, err, name)
		}
	}
}

func TestEvaluateRejects(t *testing.T) {
	t.Parallel()
	cfg := DefaultConfig()
	good := func() Refit { return handRefit(t, "W1", 2, concat(members("a", 2, 0), members("b", 2, 1))) }
	cases := map[string]struct {
		mut  func(*Refit, *Memory)
		want error
		in   string
	}{
		"category":   {func(r *Refit, _ *Memory) { r.Category = "" }, ErrRefit, "category"},
		"refit":      {func(r *Refit, _ *Memory) { r.Refit = "" }, ErrRefit, "refit"},
		"length":     {func(r *Refit, _ *Memory) { r.Data = r.Data[1:] }, ErrRefit, "data"},
		"duplicate":  {func(r *Refit, _ *Memory) { r.Products[1] = r.Products[0] }, ErrRefit, "twice"},
		"partition":  {func(r *Refit, _ *Memory) { r.Summary.Partition[0] = 5 }, ErrRefit, "partition"},
		"membership": {func(r *Refit, _ *Memory) { r.Summary.Membership[0][0] = math.NaN() }, ErrRefit, "membership"},
		"threshold":  {func(r *Refit, _ *Memory) { r.Summary.Next[0].Threshold = 0.3 }, ErrRefit, "threshold"},
		"empty seg": {func(r *Refit, _ *Memory) {
			r.Summary.Segments = append(r.Summary.Segments, sequential.SegmentSummary{})
			for i := range r.Summary.Membership {
				r.Summary.Membership[i] = append(r.Summary.Membership[i], 0)
			}
		}, ErrRefit, "segments[2]"},
		"memory id": {func(_ *Refit, m *Memory) { m.Point = map[string]string{"aa": "S9"} }, ErrMemory, "point"},
		"memory p":  {func(_ *Refit, m *Memory) { m.Alert = map[string]AlertMemory{"aa": {Probability: 2}} }, ErrMemory, "probability"},
	}
	for name, tc := range cases {
		r, m := good(), Memory{}
		tc.mut(&r, &m)
		_, err := Evaluate(cfg, m, r)
		if !errors.Is(err, tc.want) || !strings.Contains(err.Error(), tc.in) {
			t.Errorf("%s: %v, want %v naming %q", name, err, tc.want, tc.in)
		}
	}
}
