package stream

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"sync"
	"time"

	"github.com/nats-io/nats-server/v2/server"
)

// Defaults of [EmbeddedConfig].
const (
	// DefaultEmbeddedHost is the interface the embedded server listens on
	// when none is given: loopback only, so that outside publishers on the
	// same machine can connect but nothing else can.
	DefaultEmbeddedHost = "127.0.0.1"
	// DefaultEmbeddedPort is the NATS client port used when none is given.
	DefaultEmbeddedPort = 4222
	// embeddedReadyTimeout bounds how long StartEmbedded waits for the
	// server to accept clients.
	embeddedReadyTimeout = 10 * time.Second
)

// EmbeddedConfig configures [StartEmbedded].
type EmbeddedConfig struct {
	// StoreDir is the directory JetStream keeps its streams in; required.
	// The service puts it beside the state file.
	StoreDir string
	// Host is the interface to listen on; "" means DefaultEmbeddedHost.
	Host string
	// Port is the client port: 0 means DefaultEmbeddedPort, -1 a random
	// free port (tests), otherwise 1..65535.
	Port int
	// NoLog silences the server's own log lines. A fatal error is still
	// reported in StartEmbedded's error.
	NoLog bool
}

// Embedded is an in-process nats-server with JetStream, for a worker run
// with no --nats URL and for tests. Every JetStream write is fsynced before
// it is acknowledged (SyncAlways), so an acknowledged input message
// survives a power cut, not only a process crash. Its methods are safe for
// concurrent use.
type Embedded struct {
	srv *server.Server
	log *serverLog
}

// StartEmbedded starts a nats-server with JetStream enabled, storing its
// streams under cfg.StoreDir, and waits until it accepts clients (at most
// ten seconds, less if ctx ends sooner or the server reports a fatal
// error). It fails, and leaves nothing
// running, when the options are invalid, the port is taken or JetStream
// cannot use the store directory. lg receives the server's log lines
// (unless cfg.NoLog); nil discards them.
func StartEmbedded(ctx context.Context, cfg EmbeddedConfig, lg *slog.Logger) (*Embedded, error) {
	if cfg.StoreDir == "" {
		return nil, errors.New("stream: EmbeddedConfig.StoreDir is empty")
	}
	host := cfg.Host
	if host == "" {
		host = DefaultEmbeddedHost
	}
	port := cfg.Port
	switch {
	case port == 0:
		port = DefaultEmbeddedPort
	case port == -1:
		// server.RANDOM_PORT: the server picks a free port.
	case port < 1 || port > 65535:
		return nil, fmt.Errorf("stream: EmbeddedConfig.Port is %d, want 1..65535, 0 for %d or -1 for a random port",
			port, DefaultEmbeddedPort)
	}
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("stream: start embedded nats-server: %w", err)
	}
	opts := &server.Options{
		ServerName: "rivalmix-embedded",
		Host:       host,
		Port:       port,
		JetStream:  true,
		StoreDir:   cfg.StoreDir,
		// SyncAlways makes the file store fsync every write before the
		// publish is acknowledged (durability rule 7).
		SyncAlways: true,
		// The worker process owns signal handling.
		NoSigs: true,
		NoLog:  cfg.NoLog,
	}
	srv, err := server.NewServer(opts)
	if err != nil {
		return nil, fmt.Errorf("stream: embedded nats-server options (host %q, port %d, store %s): %w",
			host, port, cfg.StoreDir, err)
	}
	if lg == nil {
		lg = slog.New(slog.DiscardHandler)
	}
	sl := &serverLog{lg: lg.With("component", "nats-server"), quiet: cfg.NoLog}
	// Installed even with NoLog: the server reports a failed listen or a
	// failed JetStream start only through its logger, and the adapter
	// keeps that line for the error below. It never exits the process.
	srv.SetLoggerV2(sl, false, false, false)
	go srv.Start()

	e := &Embedded{srv: srv, log: sl}
	if err := e.waitReady(ctx); err != nil {
		e.Shutdown()
		return nil, fmt.Errorf("stream: start embedded nats-server on %s:%d: %w", host, port, err)
	}
	if !srv.JetStreamEnabled() {
		e.Shutdown()
		return nil, fmt.Errorf("stream: embedded nats-server started without JetStream (store %s)%s",
			cfg.StoreDir, sl.fatalSuffix())
	}
	return e, nil
}

// waitReady polls the server in short steps, so that a fatal error (a
// port in use) or the end of ctx ends the wait at once instead of after
// the whole timeout.
func (e *Embedded) waitReady(ctx context.Context) error {
	const step = 50 * time.Millisecond
	deadline := time.Now().Add(embeddedReadyTimeout)
	for {
		if e.srv.ReadyForConnections(step) {
			return nil
		}
		if f := e.log.fatalMessage(); f != "" {
			return errors.New(f)
		}
		if err := ctx.Err(); err != nil {
			return err
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("not ready after %s", embeddedReadyTimeout)
		}
	}
}

// ClientURL returns the URL clients connect to, e.g. "nats://127.0.0.1:4222".
func (e *Embedded) ClientURL() string { return e.srv.ClientURL() }

// Port returns the client port the server listens on; with Port -1 in the
// config this is the port it picked, which a test passes to a second
// StartEmbedded to restart the server in place.
// It returns 0 once the server has shut down.
func (e *Embedded) Port() int {
	if a, ok := e.srv.Addr().(*net.TCPAddr); ok {
		return a.Port
	}
	return 0
}

// Shutdown stops the server and waits until it has stopped. Clients see a
// disconnect; the stored streams stay in StoreDir. Calling it again does
// nothing.
func (e *Embedded) Shutdown() {
	e.srv.Shutdown()
	e.srv.WaitForShutdown()
}

// serverLog passes nats-server's log lines to slog. Fatal lines are logged
// as errors and remembered; the process is never ended from here.
type serverLog struct {
	lg    *slog.Logger
	quiet bool

	mu    sync.Mutex
	fatal string
}

func (l *serverLog) fatalMessage() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.fatal
}

func (l *serverLog) fatalSuffix() string {
	if f := l.fatalMessage(); f != "" {
		return ": " + f
	}
	return ""
}

func (l *serverLog) emit(level slog.Level, format string, v []any) {
	if l.quiet {
		return
	}
	l.lg.Log(context.Background(), level, fmt.Sprintf(format, v...))
}

// Noticef logs at info level.
func (l *serverLog) Noticef(format string, v ...any) { l.emit(slog.LevelInfo, format, v) }

// Warnf logs at warn level.
func (l *serverLog) Warnf(format string, v ...any) { l.emit(slog.LevelWarn, format, v) }

// Errorf logs at error level.
func (l *serverLog) Errorf(format string, v ...any) { l.emit(slog.LevelError, format, v) }

// Debugf logs at debug level.
func (l *serverLog) Debugf(format string, v ...any) { l.emit(slog.LevelDebug, format, v) }

// Tracef logs at debug level; the server only traces when asked to.
func (l *serverLog) Tracef(format string, v ...any) { l.emit(slog.LevelDebug, format, v) }

// Fatalf remembers the line for StartEmbedded's error and logs it.
func (l *serverLog) Fatalf(format string, v ...any) {
	msg := fmt.Sprintf(format, v...)
	l.mu.Lock()
	if l.fatal == "" {
		l.fatal = msg
	}
	l.mu.Unlock()
	if !l.quiet {
		l.lg.Error(msg)
	}
}
