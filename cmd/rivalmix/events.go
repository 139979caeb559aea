package main

import (
	"flag"

	"rivalmix/alerts"
)

// eventFlags registers the CloudEvents attribute flags that serve, demo
// and replay share, filling cfg.
func eventFlags(fs *flag.FlagSet, cfg *alerts.CloudEventConfig) {
	*cfg = alerts.DefaultCloudEventConfig()
	fs.StringVar(&cfg.Source, "event-source", cfg.Source,
		"absolute URI naming this producer in the events' source attribute; the category is appended (a URN after ':', a URL as a path segment)")
	fs.StringVar(&cfg.TypePrefix, "event-type-prefix", cfg.TypePrefix,
		"reverse-DNS name the events' type attribute starts with (your organisation's, e.g. com.larkfield.pricing)")
}
