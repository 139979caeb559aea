package alerts

import (
	"encoding/json"
	"fmt"
	"net/url"
	"strings"
	"time"
)

// Defaults of CloudEventConfig.
const (
	// DefaultTypePrefix is the reverse-DNS prefix of the type attribute
	// when none is configured. It is a placeholder under the domain
	// reserved for examples: a deployment sets its own organisation's
	// name, as the CloudEvents specification recommends.
	DefaultTypePrefix = "com.example.rivalmix"
	// DefaultSource is the source URI of events when none is configured;
	// events of category c carry "urn:rivalmix:c".
	DefaultSource = "urn:rivalmix"
)

// CloudEventContentType is the content type of CloudEvent's output, for
// the message's Content-Type header in the structured mode of the
// CloudEvents NATS binding.
const CloudEventContentType = "application/cloudevents+json"

// CloudEventConfig names the producer of events in their CloudEvents
// attributes.
type CloudEventConfig struct {
	// Source is an absolute URI naming the producer (it has a scheme);
	// the source of an event of category c is Source with c appended as a
	// path segment ("https://pricing.example/rivalmix/c"), or after a
	// colon for an opaque URI such as a URN ("urn:rivalmix:c").
	Source string
	// TypePrefix is the reverse-DNS name the type attribute starts with,
	// followed by ".segment.moved" and the like: dot-separated labels of
	// letters, digits and '-', at least two.
	TypePrefix string
}

// DefaultCloudEventConfig returns DefaultSource and DefaultTypePrefix.
func DefaultCloudEventConfig() CloudEventConfig {
	return CloudEventConfig{Source: DefaultSource, TypePrefix: DefaultTypePrefix}
}

// Validate reports a source that is not an absolute URI or a type prefix
// that is not a reverse-DNS name; the error names the setting.
func (c CloudEventConfig) Validate() error {
	u, err := url.Parse(c.Source)
	if err != nil || u.Scheme == "" || (u.Opaque == "" && u.Host == "" && u.Path == "") {
		return fmt.Errorf("%w: CloudEventConfig.Source %q is not an absolute URI (like urn:rivalmix or https://pricing.example/rivalmix)",
			ErrEvent, c.Source)
	}
	if u.RawQuery != "" || u.Fragment != "" {
		return fmt.Errorf("%w: CloudEventConfig.Source %q has a query or fragment; the category is appended to it", ErrEvent, c.Source)
	}
	labels := strings.Split(c.TypePrefix, ".")
	if len(labels) < 2 {
		return fmt.Errorf("%w: CloudEventConfig.TypePrefix %q is not a reverse-DNS name (like com.example.rivalmix)", ErrEvent, c.TypePrefix)
	}
	for _, l := range labels {
		if l == "" || strings.Trim(l, "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-") != "" {
			return fmt.Errorf("%w: CloudEventConfig.TypePrefix %q has label %q; want letters, digits and '-' between dots",
				ErrEvent, c.TypePrefix, l)
		}
	}
	return nil
}

// SourceOf returns the source attribute of the events of a category.
func (c CloudEventConfig) SourceOf(category string) string {
	if u, err := url.Parse(c.Source); err == nil && u.Opaque != "" {
		return c.Source + ":" + category
	}
	return strings.TrimSuffix(c.Source, "/") + "/" + url.PathEscape(category)
}

// cloudEvent is the structured-mode JSON form of CloudEvents 1.0, fields
// in the order the specification lists them.
type cloudEvent struct {
	SpecVersion     string          `json:"specversion"`
	ID              string          `json:"id"`
	Source          string          `json:"source"`
	Type            string          `json:"type"`
	Subject         string          `json:"subject,omitempty"`
	Time            string          `json:"time"`
	DataContentType string          `json:"datacontenttype"`
	Data            json.RawMessage `json:"data"`
}

// CloudEvent returns the event as one CloudEvents 1.0 JSON object
// (structured content mode): specversion "1.0", id, source
// (cfg.SourceOf(e.Category)), type (e.Kind.Type(cfg.TypePrefix)),
// subject, time (at, RFC 3339 in UTC), datacontenttype
// "application/json" and data. at is the time the caller assigns to the
// event (this package reads no clock). Equal inputs give equal bytes; the
// result is owned by the caller.
//
// Errors wrap ErrEvent: an invalid cfg, an unknown kind, a zero time, or
// a body that does not encode.
func (e Event) CloudEvent(cfg CloudEventConfig, at time.Time) ([]byte, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("event %s: %w", e.ID, err)
	}
	typ := e.Kind.Type(cfg.TypePrefix)
	if typ == "" {
		return nil, fmt.Errorf("%w: event %s: kind %q unknown", ErrEvent, e.ID, e.Kind)
	}
	if at.IsZero() {
		return nil, fmt.Errorf("%w: event %s: time is zero; every event carries one", ErrEvent, e.ID)
	}
	data, err := json.Marshal(e.Data)
	if err != nil {
		return nil, fmt.Errorf("%w: event %s data: %w", ErrEvent, e.ID, err)
	}
	ce := cloudEvent{SpecVersion: "1.0", ID: e.ID, Source: cfg.SourceOf(e.Category), Type: typ, Subject: e.Subject,
		Time: at.UTC().Format(time.RFC3339Nano), DataContentType: "application/json", Data: data}
	out, err := json.Marshal(ce)
	if err != nil {
		return nil, fmt.Errorf("%w: event %s: %w", ErrEvent, e.ID, err)
	}
	return out, nil
}
