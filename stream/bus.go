package stream

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/stream/input"
)

// BusConfig names the JetStream streams and the durable consumer the
// service uses, and sets their delivery rules. Start from
// [DefaultBusConfig]; the zero value is not valid.
type BusConfig struct {
	// InputStream is the stream holding input messages ("RIVALMIX_IN").
	InputStream string
	// InputSubjects is the input stream's subject filter, a literal
	// prefix followed by ".>" ("rivalmix.in.>"); the category is the one
	// token after the prefix. The stream also takes the bare prefix
	// ("rivalmix.in"), so that a message published without a category is
	// stored and rejected with its reason instead of refused at publish.
	InputSubjects string
	// OutputStream holds the published events ("RIVALMIX_OUT").
	OutputStream string
	// OutputSubjects is the output stream's filter, a literal prefix
	// followed by ".>" ("rivalmix.out.>"); events go to
	// <prefix>.<category>.<kind>.
	OutputSubjects string
	// RejectedStream holds rejected input ("RIVALMIX_REJECTED").
	RejectedStream string
	// RejectedPrefix is the literal subject prefix of rejected input
	// ("rivalmix.rejected"); a message rejected from category c goes to
	// <prefix>.c and the stream takes <prefix>.>.
	RejectedPrefix string
	// Durable is the name of the durable pull consumer on the input
	// stream ("rivalmix-worker").
	Durable string
	// AckWait is how long the server waits for the ack of a delivery
	// before redelivering it (30 s) when BackOff is empty. When BackOff is
	// set the server uses BackOff instead (see there), so Validate asks
	// BackOff[0] to be at least AckWait.
	AckWait time.Duration
	// MaxDeliver is how many times a message is delivered before the
	// server gives up on it (5); -1 means without limit.
	MaxDeliver int
	// BackOff are the ack waits of the successive deliveries of one
	// message: delivery k waits BackOff[min(k, len)-1] for its ack before
	// it is redelivered ({30 s, 1 min, 5 min}). The server replaces AckWait
	// by BackOff[0], so BackOff[0] must be >= AckWait or the first
	// delivery of a message in a slow batch would be redelivered before
	// the batch commits. At most MaxDeliver entries.
	BackOff []time.Duration
	// DuplicateWindow is how long the output stream remembers event ids
	// (Nats-Msg-Id) to drop a republished event (2 min). It also applies
	// to the rejected stream, which is keyed by input sequence.
	DuplicateWindow time.Duration
	// Replicas is the number of copies of each stream in a cluster (1);
	// use 3 across failure domains in production.
	Replicas int
	// MaxMsgSize, when > 0, is the largest message in bytes the input
	// stream accepts; 0 leaves it to the server's max_payload (1 MiB by
	// default). Keep it above the decoder's limit so that an oversized
	// message still reaches the worker and lands on the rejected stream
	// with its reason instead of being refused at publish.
	MaxMsgSize int32
	// MaxAckPending, when > 0, bounds the messages delivered and not yet
	// acked; 0 leaves the server default (1000). It must exceed the
	// micro-batch size.
	MaxAckPending int
	// Partitions is the number of partitions the categories are spread
	// over (1, 1..MaxPartitions). With more than one, the input stream
	// stores rivalmix.in.<category> as <PartitionPrefix>.<p>.<category>
	// (see PartitionTransform) and each partition has its own durable
	// consumer, claimed by one worker at a time. It is fixed when the
	// input stream is created: CreateStreams refuses to change it on a
	// stream that holds messages.
	Partitions int
	// PartitionPrefix is the literal subject prefix of stored partitioned
	// input ("rivalmix.part"); it must not overlap the other prefixes.
	PartitionPrefix string
}

// DefaultBusConfig returns the names from the architecture (RIVALMIX_IN
// on rivalmix.in.>, RIVALMIX_OUT on rivalmix.out.>, RIVALMIX_REJECTED on
// rivalmix.rejected.>, consumer rivalmix-worker), AckWait 30 s,
// MaxDeliver 5, BackOff 30 s, 1 min, 5 min, a 2 min duplicate window and
// one replica.
func DefaultBusConfig() BusConfig {
	return BusConfig{
		InputStream:     "RIVALMIX_IN",
		InputSubjects:   input.DefaultInputPrefix + ".>",
		OutputStream:    "RIVALMIX_OUT",
		OutputSubjects:  "rivalmix.out.>",
		RejectedStream:  "RIVALMIX_REJECTED",
		RejectedPrefix:  DefaultRejectedPrefix,
		Durable:         "rivalmix-worker",
		AckWait:         30 * time.Second,
		MaxDeliver:      5,
		BackOff:         []time.Duration{30 * time.Second, time.Minute, 5 * time.Minute},
		DuplicateWindow: 2 * time.Minute,
		Replicas:        1,
		Partitions:      1,
		PartitionPrefix: DefaultPartitionPrefix,
	}
}

// DefaultRejectedPrefix is the subject prefix of rejected input.
const DefaultRejectedPrefix = "rivalmix.rejected"

// UnknownCategory is the category token used on the rejected stream for a
// message whose subject names no valid category.
const UnknownCategory = "_unknown"

// Validate reports the first field that the server would refuse or that
// breaks the service's assumptions; the error names the field.
func (c BusConfig) Validate() error {
	for _, f := range []struct{ field, v string }{
		{"InputStream", c.InputStream}, {"OutputStream", c.OutputStream},
		{"RejectedStream", c.RejectedStream}, {"Durable", c.Durable},
	} {
		if f.v == "" || strings.ContainsAny(f.v, ".*> \t\r\n/\\") {
			return fmt.Errorf("stream: BusConfig.%s is %q, want a non-empty name without '.', '*', '>', '/', '\\' or spaces",
				f.field, f.v)
		}
	}
	if c.InputStream == c.OutputStream || c.InputStream == c.RejectedStream || c.OutputStream == c.RejectedStream {
		return fmt.Errorf("stream: BusConfig.InputStream %q, OutputStream %q and RejectedStream %q must differ",
			c.InputStream, c.OutputStream, c.RejectedStream)
	}
	in, err := wildcardPrefix("InputSubjects", c.InputSubjects)
	if err != nil {
		return err
	}
	out, err := wildcardPrefix("OutputSubjects", c.OutputSubjects)
	if err != nil {
		return err
	}
	if err := literalSubject("RejectedPrefix", c.RejectedPrefix); err != nil {
		return err
	}
	if c.Partitions < 1 || c.Partitions > MaxPartitions {
		return fmt.Errorf("stream: BusConfig.Partitions is %d, want 1..%d", c.Partitions, MaxPartitions)
	}
	prefixes := []struct{ field, p string }{{"InputSubjects", in}, {"OutputSubjects", out}, {"RejectedPrefix", c.RejectedPrefix}}
	if c.Partitioned() {
		if err := literalSubject("PartitionPrefix", c.PartitionPrefix); err != nil {
			return err
		}
		prefixes = append(prefixes, struct{ field, p string }{"PartitionPrefix", c.PartitionPrefix})
	}
	for i, a := range prefixes {
		for _, b := range prefixes[i+1:] {
			if a.p == b.p || strings.HasPrefix(a.p, b.p+".") || strings.HasPrefix(b.p, a.p+".") {
				return fmt.Errorf("stream: BusConfig.%s (%q) and BusConfig.%s (%q) overlap; streams must not share subjects",
					a.field, a.p, b.field, b.p)
			}
		}
	}
	switch {
	case c.AckWait <= 0:
		return fmt.Errorf("stream: BusConfig.AckWait is %s, want > 0", c.AckWait)
	case c.MaxDeliver == 0 || c.MaxDeliver < -1:
		return fmt.Errorf("stream: BusConfig.MaxDeliver is %d, want >= 1 or -1 for no limit", c.MaxDeliver)
	case c.MaxDeliver > 0 && len(c.BackOff) > c.MaxDeliver:
		return fmt.Errorf("stream: BusConfig.BackOff has %d entries, more than MaxDeliver %d", len(c.BackOff), c.MaxDeliver)
	case c.DuplicateWindow <= 0:
		return fmt.Errorf("stream: BusConfig.DuplicateWindow is %s, want > 0", c.DuplicateWindow)
	case c.Replicas < 1 || c.Replicas > 5:
		return fmt.Errorf("stream: BusConfig.Replicas is %d, want 1..5", c.Replicas)
	case c.MaxMsgSize < 0:
		return fmt.Errorf("stream: BusConfig.MaxMsgSize is %d, want >= 0 (0 for the server's limit)", c.MaxMsgSize)
	case c.MaxAckPending < 0:
		return fmt.Errorf("stream: BusConfig.MaxAckPending is %d, want >= 0 (0 for the server default)", c.MaxAckPending)
	}
	for i, b := range c.BackOff {
		if b <= 0 {
			return fmt.Errorf("stream: BusConfig.BackOff[%d] is %s, want > 0", i, b)
		}
	}
	if len(c.BackOff) > 0 && c.BackOff[0] < c.AckWait {
		return fmt.Errorf("stream: BusConfig.BackOff[0] is %s, below AckWait %s; the server would redeliver after %s",
			c.BackOff[0], c.AckWait, c.BackOff[0])
	}
	return nil
}

// InputPrefix returns the literal part of InputSubjects ("rivalmix.in"),
// the prefix input.CategoryFromSubject takes. Only meaningful when Validate
// passes.
func (c BusConfig) InputPrefix() string { return strings.TrimSuffix(c.InputSubjects, ".>") }

// OutputPrefix returns the literal part of OutputSubjects
// ("rivalmix.out"), the prefix of alerts.Event.NATSSubject. Only
// meaningful when Validate passes.
func (c BusConfig) OutputPrefix() string { return strings.TrimSuffix(c.OutputSubjects, ".>") }

// RejectedSubject returns where rejected input from inputSubject goes:
// RejectedPrefix.<category>, or RejectedPrefix._unknown when the subject
// names no valid category.
func (c BusConfig) RejectedSubject(inputSubject string) string {
	cat, err := c.CategoryOf(inputSubject)
	if err != nil {
		cat = UnknownCategory
	}
	return c.RejectedPrefix + "." + cat
}

func wildcardPrefix(field, subjects string) (string, error) {
	p, ok := strings.CutSuffix(subjects, ".>")
	if !ok {
		return "", fmt.Errorf("stream: BusConfig.%s is %q, want a literal prefix followed by \".>\"", field, subjects)
	}
	return p, literalSubject(field, p)
}

func literalSubject(field, s string) error {
	for _, tok := range strings.Split(s, ".") {
		if tok == "" || strings.ContainsAny(tok, "*> \t\r\n") {
			return fmt.Errorf("stream: BusConfig.%s has prefix %q, want a literal NATS subject (non-empty tokens, no wildcards or spaces)",
				field, s)
		}
	}
	return nil
}

// StreamConfigs returns the configurations CreateStreams applies: input,
// output and rejected, in that order. All three are file-backed with the
// default limits retention, so the input stream keeps every message and a
// lost state file can be rebuilt by replaying it.
func (c BusConfig) StreamConfigs() []jetstream.StreamConfig {
	in := jetstream.StreamConfig{
		Name:        c.InputStream,
		Description: "rivalmix input: product refit results and control messages",
		Subjects:    c.inputSubjects(),
		Storage:     jetstream.FileStorage,
		Replicas:    c.Replicas,
		MaxMsgSize:  c.MaxMsgSize,
		// With partitions the server itself maps each category to its
		// partition as the message is stored.
		SubjectTransform: c.PartitionTransform(),
	}
	out := jetstream.StreamConfig{
		Name:        c.OutputStream,
		Description: "rivalmix events: segment moves, births, retirements, missed competitors, refit summaries",
		Subjects:    []string{c.OutputSubjects},
		Storage:     jetstream.FileStorage,
		Replicas:    c.Replicas,
		Duplicates:  c.DuplicateWindow,
	}
	rej := jetstream.StreamConfig{
		Name:        c.RejectedStream,
		Description: "rivalmix rejected input with the reason in headers",
		Subjects:    []string{c.RejectedPrefix + ".>"},
		Storage:     jetstream.FileStorage,
		Replicas:    c.Replicas,
		Duplicates:  c.DuplicateWindow,
	}
	return []jetstream.StreamConfig{in, out, rej}
}

// inputSubjects are the input stream's subjects: the categories' and the
// bare prefix.
func (c BusConfig) inputSubjects() []string { return []string{c.InputSubjects, c.InputPrefix()} }

// ConsumerConfig returns the durable pull consumer EnsureStreams applies
// to the input stream: explicit acks, AckWait, MaxDeliver and BackOff,
// delivering every input subject from the first message.
func (c BusConfig) ConsumerConfig() jetstream.ConsumerConfig {
	return jetstream.ConsumerConfig{
		Durable:        c.Durable,
		Description:    "rivalmix worker",
		DeliverPolicy:  jetstream.DeliverAllPolicy,
		AckPolicy:      jetstream.AckExplicitPolicy,
		AckWait:        c.AckWait,
		MaxDeliver:     c.MaxDeliver,
		BackOff:        c.BackOff,
		FilterSubjects: c.inputSubjects(),
		MaxAckPending:  c.MaxAckPending,
	}
}

// CreateStreams creates the input, output and rejected streams, or
// updates them to cfg when they exist, so it is safe to call at every
// start. It leaves the durable consumer alone: the service re-creates that
// at Run to deliver from the state file's position. A change the server
// cannot make in place (the storage type) is an error naming the stream.
func CreateStreams(ctx context.Context, js jetstream.JetStream, cfg BusConfig) error {
	if err := cfg.Validate(); err != nil {
		return err
	}
	for _, sc := range cfg.StreamConfigs() {
		if sc.Name == cfg.InputStream {
			if err := checkPartitioning(ctx, js, sc); err != nil {
				return err
			}
		}
		if _, err := js.CreateOrUpdateStream(ctx, sc); err != nil {
			return fmt.Errorf("stream: create or update stream %s (subjects %v): %w", sc.Name, sc.Subjects, err)
		}
	}
	return nil
}

// checkPartitioning refuses to change the partitioning of an input stream
// that already holds messages: those stay under the subjects they were
// stored with, so a category would be split over two partitions.
func checkPartitioning(ctx context.Context, js jetstream.JetStream, want jetstream.StreamConfig) error {
	st, err := js.Stream(ctx, want.Name)
	if errors.Is(err, jetstream.ErrStreamNotFound) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("stream: look up stream %s: %w", want.Name, err)
	}
	info := st.CachedInfo()
	have := info.Config.SubjectTransform
	same := (have == nil && want.SubjectTransform == nil) ||
		(have != nil && want.SubjectTransform != nil && *have == *want.SubjectTransform)
	if same || info.State.Msgs == 0 {
		return nil
	}
	desc := func(t *jetstream.SubjectTransformConfig) string {
		if t == nil {
			return "no partitioning"
		}
		return t.Source + " -> " + t.Destination
	}
	return fmt.Errorf("stream: stream %s holds %d messages stored with %s; --partitions would change it to %s. "+
		"Keep the partition count the stream was created with, or create a new input stream",
		want.Name, info.State.Msgs, desc(have), desc(want.SubjectTransform))
}

// EnsureStreams runs CreateStreams and creates the durable consumer, or
// updates it to cfg, for a caller that reads the input without the
// service (tools, tests). A change the server cannot make in place (the
// consumer's deliver policy) is an error naming the consumer. Fetch the
// consumer afterwards with js.Consumer(ctx, cfg.InputStream, cfg.Durable).
func EnsureStreams(ctx context.Context, js jetstream.JetStream, cfg BusConfig) error {
	if err := CreateStreams(ctx, js, cfg); err != nil {
		return err
	}
	if _, err := js.CreateOrUpdateConsumer(ctx, cfg.InputStream, cfg.ConsumerConfig()); err != nil {
		return fmt.Errorf("stream: create or update consumer %s on stream %s: %w", cfg.Durable, cfg.InputStream, err)
	}
	return nil
}

// ConnectOptions are the credentials and TLS files the NATS ecosystem
// uses. All are optional; set at most one way to authenticate.
type ConnectOptions struct {
	// Name is the connection name shown by the server's monitoring.
	Name string
	// CredsFile is a user credentials file (JWT and NKey seed).
	CredsFile string
	// NKeyFile is a file holding an NKey user seed.
	NKeyFile string
	// User and Password authenticate with a user name and password.
	User, Password string
	// Token authenticates with a token.
	Token string
	// TLSCert and TLSKey are a client certificate and its key (PEM), for
	// servers that verify clients; give both or neither.
	TLSCert, TLSKey string
	// TLSCA is a PEM file of root CAs to verify the server with.
	TLSCA string
	// ReconnectWait is the pause between reconnect attempts; 0 means 2 s.
	ReconnectWait time.Duration
}

// Validate reports an incomplete or conflicting option, naming it.
func (o ConnectOptions) Validate() error {
	ways := 0
	for _, set := range []bool{o.CredsFile != "", o.NKeyFile != "", o.User != "" || o.Password != "", o.Token != ""} {
		if set {
			ways++
		}
	}
	switch {
	case ways > 1:
		return errors.New("stream: ConnectOptions: set only one of CredsFile, NKeyFile, User/Password and Token")
	case o.User == "" && o.Password != "":
		return errors.New("stream: ConnectOptions.Password is set without User")
	case (o.TLSCert == "") != (o.TLSKey == ""):
		return fmt.Errorf("stream: ConnectOptions.TLSCert (%q) and TLSKey (%q) must be given together", o.TLSCert, o.TLSKey)
	case o.ReconnectWait < 0:
		return fmt.Errorf("stream: ConnectOptions.ReconnectWait is %s, want >= 0", o.ReconnectWait)
	}
	return nil
}

// Connect connects to the NATS servers at url (a comma-separated list is
// allowed) and waits for the first connection until ctx ends; a server
// that is not up yet is retried. Once connected the connection reconnects
// forever, buffering publishes while it is away; disconnects, reconnects
// and asynchronous errors are logged to lg (nil discards them). The caller
// closes (or drains) the returned connection.
func Connect(ctx context.Context, url string, opts ConnectOptions, lg *slog.Logger) (*nats.Conn, error) {
	if url == "" {
		return nil, errors.New("stream: Connect: NATS url is empty")
	}
	if err := opts.Validate(); err != nil {
		return nil, err
	}
	if lg == nil {
		lg = slog.New(slog.DiscardHandler)
	}
	wait := opts.ReconnectWait
	if wait == 0 {
		wait = 2 * time.Second
	}
	connected := make(chan struct{}, 1)
	signal := func() {
		select {
		case connected <- struct{}{}:
		default:
		}
	}
	no := []nats.Option{
		nats.MaxReconnects(-1),
		nats.ReconnectWait(wait),
		nats.RetryOnFailedConnect(true),
		nats.ConnectHandler(func(nc *nats.Conn) {
			lg.Info("nats connected", "url", nc.ConnectedUrlRedacted())
			signal()
		}),
		nats.DisconnectErrHandler(func(nc *nats.Conn, err error) {
			if err != nil {
				lg.Warn("nats disconnected", "err", err)
				return
			}
			lg.Info("nats disconnected")
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) {
			lg.Info("nats reconnected", "url", nc.ConnectedUrlRedacted())
			signal()
		}),
		nats.ClosedHandler(func(nc *nats.Conn) {
			if err := nc.LastError(); err != nil {
				lg.Info("nats connection closed", "err", err)
				return
			}
			lg.Info("nats connection closed")
		}),
		nats.ErrorHandler(func(nc *nats.Conn, sub *nats.Subscription, err error) {
			if sub != nil {
				lg.Error("nats async error", "subject", sub.Subject, "err", err)
				return
			}
			lg.Error("nats async error", "err", err)
		}),
	}
	if opts.Name != "" {
		no = append(no, nats.Name(opts.Name))
	}
	switch {
	case opts.CredsFile != "":
		no = append(no, nats.UserCredentials(opts.CredsFile))
	case opts.NKeyFile != "":
		o, err := nats.NkeyOptionFromSeed(opts.NKeyFile)
		if err != nil {
			return nil, fmt.Errorf("stream: ConnectOptions.NKeyFile %s: %w", opts.NKeyFile, err)
		}
		no = append(no, o)
	case opts.User != "":
		no = append(no, nats.UserInfo(opts.User, opts.Password))
	case opts.Token != "":
		no = append(no, nats.Token(opts.Token))
	}
	if opts.TLSCert != "" {
		no = append(no, nats.ClientCert(opts.TLSCert, opts.TLSKey))
	}
	if opts.TLSCA != "" {
		no = append(no, nats.RootCAs(opts.TLSCA))
	}
	nc, err := nats.Connect(url, no...)
	if err != nil {
		return nil, fmt.Errorf("stream: connect to NATS %s: %w", redactURL(url), err)
	}
	if nc.IsConnected() {
		return nc, nil
	}
	select {
	case <-connected:
		return nc, nil
	case <-ctx.Done():
		last := nc.LastError()
		nc.Close()
		if last != nil {
			return nil, fmt.Errorf("stream: connect to NATS %s: %w (last error: %w)", redactURL(url), ctx.Err(), last)
		}
		return nil, fmt.Errorf("stream: connect to NATS %s: %w", redactURL(url), ctx.Err())
	}
}

// redactURL hides user info in a NATS URL list for error messages.
func redactURL(url string) string {
	parts := strings.Split(url, ",")
	for i, p := range parts {
		scheme, rest, ok := strings.Cut(p, "://")
		if !ok {
			continue
		}
		if at := strings.LastIndex(rest, "@"); at >= 0 {
			parts[i] = scheme + "://***@" + rest[at+1:]
		}
	}
	return strings.Join(parts, ",")
}
