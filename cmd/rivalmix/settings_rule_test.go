package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"rivalmix/alerts"
)

// TestMoveRuleSettings: the filter's and the alert budget's keys reach
// one category's worker config and leave the defaults alone; a rule
// that does not exist, and a budget out of range, are refused naming the
// key.
func TestMoveRuleSettings(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	path := filepath.Join(dir, "rules.yaml")
	body := "categories:\n  cereal:\n    move_rule: filter\n    switch_rate: 0.014\n    temper: 0.8\n    move_prob: 0.85\n    max_alerts: 20\n    max_alert_share: 0.1\n"
	if err := os.WriteFile(path, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	f := serviceFlags{configFile: path, particles: 64, batch: 256, fetch: 256, fetchWait: 1, seed: 1, replicas: 1,
		events: alerts.DefaultCloudEventConfig()}
	sc, err := f.serviceConfig()
	if err != nil {
		t.Fatal(err)
	}
	a := sc.PerCategory["cereal"].Alerts
	if a.Rule != alerts.RuleFilter || a.SwitchRate != 0.014 || a.Temper != 0.8 || a.MoveProb != 0.85 || a.AlertBudget != 20 || a.AlertShare != 0.1 {
		t.Errorf("cereal alerts %+v, want the file's filter settings", a)
	}
	if d := sc.Worker.Alerts; d.Rule != alerts.RuleBand || d.AlertBudget != 0 {
		t.Errorf("defaults changed: %+v", d)
	}
	for key, line := range map[string]string{"move_rule": "move_rule: blend", "max_alert_share": "max_alert_share: 1.5", "temper": "temper: 0"} {
		bad := filepath.Join(dir, key+".yaml")
		os.WriteFile(bad, []byte("defaults:\n  "+line+"\n"), 0o644)
		f.configFile = bad
		if _, err := f.serviceConfig(); err == nil || !strings.Contains(err.Error(), key) {
			t.Errorf("%s: err = %v, want the key named", line, err)
		}
	}
}
