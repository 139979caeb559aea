package main

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"

	"go.yaml.in/yaml/v3"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/stream/category"
)

// envPrefix names the environment variables that stand in for flags:
// --state FILE is RIVALMIX_STATE, --http-addr is RIVALMIX_HTTP_ADDR.
const envPrefix = "RIVALMIX_"

// envName returns the environment variable of a flag.
func envName(flagName string) string {
	return envPrefix + strings.ToUpper(strings.ReplaceAll(flagName, "-", "_"))
}

// applyEnv sets every flag not given on the command line from its
// environment variable, when set. Call it after Parse.
func applyEnv(fs *flag.FlagSet) error {
	given := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { given[f.Name] = true })
	var err error
	fs.VisitAll(func(f *flag.Flag) {
		if given[f.Name] || err != nil {
			return
		}
		if v, ok := os.LookupEnv(envName(f.Name)); ok {
			if e := fs.Set(f.Name, v); e != nil {
				err = &usageError{cmd: fs.Name(), err: fmt.Errorf("environment variable %s=%q (it sets --%s): %w",
					envName(f.Name), v, f.Name, e)}
			}
		}
	})
	return err
}

// envUsage appends the environment-variable rule to a flag set's help.
func envUsage(fs *flag.FlagSet) {
	prev := fs.Usage
	fs.Usage = func() {
		prev()
		fmt.Fprintf(fs.Output(), "\nEvery flag can also be set by an environment variable: %s<FLAG> in upper case\nwith dashes as underscores (--state is %s); the command line wins.\n",
			envPrefix, envName("state"))
	}
}

// modelSettings are the per-category model and alert settings of the
// optional YAML file (--config). Absent fields keep the defaults.
//
//	defaults:
//	  particles: 256
//	  competitors: 10
//	categories:
//	  breakfast-cereal:
//	    particles: 128
//	    threshold: 0.3
type modelSettings struct {
	Particles        *int     `yaml:"particles"`
	Competitors      *int     `yaml:"competitors"`
	BatchSize        *int     `yaml:"batch_size"`
	KeepESS          *float64 `yaml:"keep_ess"`
	SplitMerge       *float64 `yaml:"split_merge"`
	BuildChains      *int     `yaml:"build_chains"`
	BuildBurn        *int     `yaml:"build_burn"`
	RefitBurn        *int     `yaml:"refit_burn"`
	MinChains        *int     `yaml:"min_chains"`
	RenewBelow       *float64 `yaml:"renew_below"`
	DiversityFloor   *float64 `yaml:"diversity_floor"`
	BatchSweeps      *int     `yaml:"batch_sweeps"`
	RandomShare      *float64 `yaml:"random_share"`
	ESSFraction      *float64 `yaml:"ess_fraction"`
	Resampler        *string  `yaml:"resampler"`
	Threshold        *float64 `yaml:"threshold"`
	AlertProbability *float64 `yaml:"alert_probability"`
	MoveIn           *float64 `yaml:"move_in"`
	MoveOut          *float64 `yaml:"move_out"`
	MoveRule         *string  `yaml:"move_rule"`
	SwitchRate       *float64 `yaml:"switch_rate"`
	Temper           *float64 `yaml:"temper"`
	MoveProb         *float64 `yaml:"move_prob"`
	AlertBudget      *int     `yaml:"max_alerts"`
	AlertShare       *float64 `yaml:"max_alert_share"`
	Alpha            *struct {
		Shape float64 `yaml:"shape"`
		Rate  float64 `yaml:"rate"`
	} `yaml:"alpha_prior"`
}

type settingsFile struct {
	Defaults   modelSettings            `yaml:"defaults"`
	Categories map[string]modelSettings `yaml:"categories"`
}

// apply overlays s on w.
func (s modelSettings) apply(w category.WorkerConfig) (category.WorkerConfig, error) {
	if s.Particles != nil {
		w.Particles.Particles = *s.Particles
	}
	if s.Competitors != nil {
		w.Competitors = *s.Competitors
	}
	if s.BatchSize != nil {
		w.BatchSize = *s.BatchSize
	}
	if s.SplitMerge != nil {
		w.Particles.SplitMerge = *s.SplitMerge
	}
	if s.BuildChains != nil {
		w.Particles.BuildChains = *s.BuildChains
	}
	if s.BuildBurn != nil {
		w.Particles.BuildBurn = *s.BuildBurn
	}
	if s.RefitBurn != nil {
		w.Particles.RefitBurn = *s.RefitBurn
	}
	if s.MinChains != nil {
		w.Particles.MinChains = *s.MinChains
	}
	if s.RenewBelow != nil {
		w.Particles.RenewBelow = *s.RenewBelow
	}
	if s.DiversityFloor != nil {
		w.Particles.DiversityFloor = *s.DiversityFloor
	}
	if s.BatchSweeps != nil {
		w.Particles.Sweeps = *s.BatchSweeps
	}
	if s.KeepESS != nil {
		w.Particles.KeepESS = *s.KeepESS
	}
	if s.RandomShare != nil {
		w.Particles.RandomShare = *s.RandomShare
	}
	if s.ESSFraction != nil {
		w.Particles.ESSFraction = *s.ESSFraction
	}
	if s.Resampler != nil {
		r, err := sequential.ParseResampler(*s.Resampler)
		if err != nil {
			return w, err
		}
		w.Particles.Resampler = r
	}
	if s.Threshold != nil {
		w.Alerts.Threshold = *s.Threshold
		w.Summary.Threshold = *s.Threshold
	}
	if s.AlertProbability != nil {
		w.Alerts.AlertProb = *s.AlertProbability
	}
	if s.MoveIn != nil {
		w.Alerts.MoveIn = *s.MoveIn
	}
	if s.MoveOut != nil {
		w.Alerts.MoveOut = *s.MoveOut
	}
	if s.MoveRule != nil {
		r, err := alerts.ParseMoveRule(*s.MoveRule)
		if err != nil {
			return w, err
		}
		w.Alerts.Rule = r
	}
	if s.SwitchRate != nil {
		w.Alerts.SwitchRate = *s.SwitchRate
	}
	if s.Temper != nil {
		w.Alerts.Temper = *s.Temper
	}
	if s.MoveProb != nil {
		w.Alerts.MoveProb = *s.MoveProb
	}
	if s.AlertBudget != nil {
		w.Alerts.AlertBudget = *s.AlertBudget
	}
	if s.AlertShare != nil {
		w.Alerts.AlertShare = *s.AlertShare
	}
	if s.Alpha != nil {
		w.Particles.Prior.AlphaShape, w.Particles.Prior.AlphaRate = s.Alpha.Shape, s.Alpha.Rate
		w.Summary.Prior = w.Particles.Prior
	}
	return w, nil
}

// loadSettings reads the YAML settings file (strict: unknown keys are
// errors) and returns the default worker settings and per-category ones.
func loadSettings(path string, base category.WorkerConfig) (category.WorkerConfig, map[string]category.WorkerConfig, error) {
	if path == "" {
		return base, nil, nil
	}
	raw, err := os.ReadFile(path)
	if err != nil {
		return base, nil, fmt.Errorf("config: %w", err)
	}
	var doc yaml.Node
	if err := yaml.Unmarshal(raw, &doc); err != nil {
		return base, nil, fmt.Errorf("config %s: not valid YAML: %w", path, err)
	}
	if err := checkSettingsFile(&doc); err != nil {
		return base, nil, fmt.Errorf("config %s %w", path, err)
	}
	var f settingsFile
	dec := yaml.NewDecoder(bytes.NewReader(raw))
	dec.KnownFields(true)
	if err := dec.Decode(&f); err != nil && !errors.Is(err, io.EOF) {
		return base, nil, fmt.Errorf("config %s: %w", path, err)
	}
	def, err := f.Defaults.apply(base)
	if err == nil {
		err = def.Validate()
	}
	if err != nil {
		return base, nil, fmt.Errorf("config %s: defaults (over the command-line flags): %w", path, err)
	}
	per := map[string]category.WorkerConfig{}
	for cat, s := range f.Categories {
		w, err := s.apply(def)
		if err == nil {
			err = w.Validate()
		}
		if err != nil {
			return base, nil, fmt.Errorf("config %s: categories.%s: %w", path, cat, err)
		}
		per[cat] = w
	}
	return def, per, nil
}
