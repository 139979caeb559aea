package alerts

import (
	"bytes"
	"encoding/json"
	"testing"

	"github.com/cloudevents/sdk-go/v2/event"
)

// TestCloudEventsSDK reads every kind of event, as CloudEvent writes it,
// with the CloudEvents Go SDK and lets the SDK validate it against the
// 1.0 specification: required attributes present and well formed, source
// a URI, time a timestamp. It also checks what the SDK read back.
func TestCloudEventsSDK(t *testing.T) {
	t.Parallel()
	kinds := map[string]bool{}
	for _, refit := range eventRun(t) {
		lines := bytes.Split(bytes.TrimSpace(refit), []byte("\n"))
		for _, line := range lines[:len(lines)-1] { // the last line is the memory
			var ev event.Event
			if err := json.Unmarshal(line, &ev); err != nil {
				t.Fatalf("SDK cannot read %s: %v", line, err)
			}
			if err := ev.Validate(); err != nil {
				t.Errorf("SDK refuses %s: %v", line, err)
			}
			if ev.SpecVersion() != "1.0" || ev.Time() != fixedTime || ev.Source() != "urn:rivalmix:breakfast-cereal" ||
				ev.DataContentType() != "application/json" || len(ev.Data()) == 0 {
				t.Errorf("SDK read %s as %v", line, ev)
			}
			kinds[ev.Type()] = true
		}
	}
	for _, k := range []Kind{KindMoved, KindBorn, KindRetired, KindSplit, KindMerged, KindMissed, KindCleared, KindSummary} {
		if !kinds[k.Type(DefaultTypePrefix)] {
			t.Errorf("no %s event was checked", k)
		}
	}
}
