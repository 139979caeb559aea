package main

import (
	"fmt"
	"reflect"
	"slices"
	"strings"

	"go.yaml.in/yaml/v3"

	"rivalmix/stream/input"
)

// The checks below read the settings file as a YAML tree before it is
// decoded, so that a mistake is reported in the file's own words (its
// line, its key path, the keys it may use) rather than as a Go type.

// settingKinds maps each key of modelSettings to what its value must be.
func settingKinds() map[string]string {
	kinds := map[string]string{}
	t := reflect.TypeFor[modelSettings]()
	for i := range t.NumField() {
		f := t.Field(i)
		key, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
		ft := f.Type
		if ft.Kind() == reflect.Pointer {
			ft = ft.Elem()
		}
		switch ft.Kind() {
		case reflect.Int:
			kinds[key] = "int"
		case reflect.Float64:
			kinds[key] = "number"
		case reflect.String:
			kinds[key] = "string"
		case reflect.Struct:
			kinds[key] = "pair"
		}
	}
	return kinds
}

// checkSettingsFile checks the top of the file: a mapping with defaults
// and categories, each category named as in its input subject. The error
// starts with "line N: " for the caller to put after the file name.
func checkSettingsFile(doc *yaml.Node) error {
	if doc.Kind != yaml.DocumentNode || len(doc.Content) == 0 {
		return nil // an empty file: the defaults
	}
	top := doc.Content[0]
	if top.Kind != yaml.MappingNode {
		return fmt.Errorf("line %d: want a mapping with the keys defaults and categories", top.Line)
	}
	kinds := settingKinds()
	for i := 0; i+1 < len(top.Content); i += 2 {
		k, v := top.Content[i], top.Content[i+1]
		switch k.Value {
		case "defaults":
			if err := checkModelSettings(v, "defaults", kinds); err != nil {
				return err
			}
		case "categories":
			if v.Kind != yaml.MappingNode {
				return fmt.Errorf("line %d: categories: want a mapping of category name to settings", v.Line)
			}
			for j := 0; j+1 < len(v.Content); j += 2 {
				name := v.Content[j].Value
				if _, err := input.CategoryFromSubject(input.DefaultInputPrefix+"."+name, ""); err != nil {
					return fmt.Errorf("line %d: categories: %q is not a category name (letters, digits, '_' and '-', as in rivalmix.in.<category>)",
						v.Content[j].Line, name)
				}
				if err := checkModelSettings(v.Content[j+1], "categories."+name, kinds); err != nil {
					return err
				}
			}
		default:
			return fmt.Errorf("line %d: unknown key %q; the file has the keys defaults and categories", k.Line, k.Value)
		}
	}
	return nil
}

// removedSettings are keys earlier releases read, with what replaced them.
var removedSettings = map[string]string{
	"refit_sweeps": "a refit's end now runs a waste-free step of as many MCMC steps as there are particles; min_chains shapes it",
	"keep_sweeps":  "the states of the refit end's waste-free step are the draws the summaries use",
}

// checkModelSettings checks one settings block at path.
func checkModelSettings(n *yaml.Node, path string, kinds map[string]string) error {
	if n.Kind == yaml.ScalarNode && n.Tag == "!!null" {
		return nil
	}
	if n.Kind != yaml.MappingNode {
		return fmt.Errorf("line %d: %s: want a mapping of settings such as particles: 256", n.Line, path)
	}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := n.Content[i], n.Content[i+1]
		kind, ok := kinds[k.Value]
		if why, gone := removedSettings[k.Value]; gone {
			return fmt.Errorf("line %d: %s: %s was removed: %s", k.Line, path, k.Value, why)
		}
		if !ok {
			known := make([]string, 0, len(kinds))
			for key := range kinds {
				known = append(known, key)
			}
			slices.Sort(known)
			return fmt.Errorf("line %d: %s: unknown key %q; the keys are %s", k.Line, path, k.Value, strings.Join(known, ", "))
		}
		if err := checkSettingValue(v, path+"."+k.Value, kind); err != nil {
			return err
		}
	}
	return nil
}

// checkSettingValue checks that a value has the kind its key wants.
func checkSettingValue(v *yaml.Node, path, kind string) error {
	got := v.Value
	if v.Kind != yaml.ScalarNode {
		got = "a list or mapping"
	}
	switch kind {
	case "int":
		if v.Kind != yaml.ScalarNode || v.Tag != "!!int" {
			return fmt.Errorf("line %d: %s: want a whole number, got %q", v.Line, path, got)
		}
	case "number":
		if v.Kind != yaml.ScalarNode || (v.Tag != "!!int" && v.Tag != "!!float") {
			return fmt.Errorf("line %d: %s: want a number, got %q", v.Line, path, got)
		}
	case "string":
		if v.Kind != yaml.ScalarNode {
			return fmt.Errorf("line %d: %s: want a word, got %s", v.Line, path, got)
		}
	case "pair":
		if v.Kind != yaml.MappingNode {
			return fmt.Errorf("line %d: %s: want {shape: NUMBER, rate: NUMBER}", v.Line, path)
		}
		for i := 0; i+1 < len(v.Content); i += 2 {
			k := v.Content[i]
			if k.Value != "shape" && k.Value != "rate" {
				return fmt.Errorf("line %d: %s: unknown key %q; the keys are shape and rate", k.Line, path, k.Value)
			}
			if err := checkSettingValue(v.Content[i+1], path+"."+k.Value, "number"); err != nil {
				return err
			}
		}
	}
	return nil
}
