// Package read serves what rivalmix knows to readers: the in-memory read
// model ([Views], one [category.View] per category as of its last refit),
// the HTTP surface (JSON read API, dashboard page, metrics, health and
// readiness) and the same queries over NATS request/reply. It reads and
// never changes the model: the service updates the views after each
// refit.
package read
