package natsjs

import (
	"cmp"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"slices"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/classwatch/classwatch/collector"
)

// Submitter is the collector's batch path: one body, decoded, validated
// and committed in one store transaction. *collector.Collector implements
// it.
type Submitter interface {
	Submit(ctx context.Context, k collector.Kind, body io.Reader, opts collector.SubmitOptions) (collector.Result, error)
}

// Options wire a Source.
type Options struct {
	Config Config
	// Submitter receives every message; required.
	Submitter Submitter
	// MaxBodyBytes is the largest message ingested, as for an HTTP body;
	// a larger one is refused. Zero means collector.DefaultMaxBodyBytes.
	MaxBodyBytes int64
	// Metrics are shared by the process's sources; required.
	Metrics *Metrics
	// Logger defaults to discarding.
	Logger *slog.Logger
}

// setupRetry is the pause between attempts to set up the stream and the
// consumer while the server is unreachable; retryPause the pause after a
// failed pull.
const (
	setupRetry = 2 * time.Second
	retryPause = 500 * time.Millisecond
)

// Source consumes one stream through a durable pull consumer. Start runs
// it; Stop stops fetching, finishes the messages in hand and closes the
// connection.
type Source struct {
	cfg       Config
	sub       Submitter
	maxBody   int64
	m         *Metrics
	log       *slog.Logger
	rejectOut map[string]string // input subject → its .rejected subject

	nc *nats.Conn
	js jetstream.JetStream

	mu       sync.Mutex
	notReady error // why the source is not ready; nil when it is

	cancelFetch context.CancelFunc // stops the fetch loop
	cancelWork  context.CancelFunc // aborts submits in progress
	done        chan struct{}      // closed when Run has returned
}

// New checks the configuration and connects. A server that cannot be
// reached is not an error: the connection keeps retrying in the
// background and Ready reports the source not ready until it succeeds.
func New(opts Options) (*Source, error) {
	if opts.Submitter == nil || opts.Metrics == nil {
		return nil, errors.New("stream source needs a submitter and metrics")
	}
	cfg := opts.Config.withDefaults()
	if err := cfg.Check(); err != nil {
		return nil, fmt.Errorf("source %s: %w", cfg.Name, err)
	}
	s := &Source{
		cfg:     cfg,
		sub:     opts.Submitter,
		maxBody: cmp.Or(opts.MaxBodyBytes, collector.DefaultMaxBodyBytes),
		m:       opts.Metrics,
		log:     cmp.Or(opts.Logger, slog.New(slog.DiscardHandler)).With("source", cfg.Name),
		rejectOut: map[string]string{
			cfg.PredictionsSubject: RejectedSubject(cfg.PredictionsSubject),
			cfg.LabelsSubject:      RejectedSubject(cfg.LabelsSubject),
		},
		notReady: errors.New("not connected yet"),
		done:     make(chan struct{}),
	}
	s.m.initSource(cfg.Name)
	var err error
	s.nc, err = nats.Connect(cfg.URL, s.connectOptions()...)
	if err != nil {
		return nil, fmt.Errorf("source %s: connect: %w", cfg.Name, err)
	}
	s.js, err = jetstream.New(s.nc)
	if err != nil {
		s.nc.Close()
		return nil, fmt.Errorf("source %s: jetstream: %w", cfg.Name, err)
	}
	return s, nil
}

// connectOptions maps the configuration onto the client's options.
func (s *Source) connectOptions() []nats.Option {
	c := s.cfg
	opts := []nats.Option{
		nats.Name("classwatch " + c.Name),
		nats.RetryOnFailedConnect(true),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(time.Second),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			if err != nil { // nil: closed on purpose
				s.log.Warn("disconnected from nats", "err", err)
			}
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) {
			s.log.Info("reconnected to nats", "server", RedactURL(nc.ConnectedUrl()))
		}),
	}
	switch {
	case c.Token != "":
		opts = append(opts, nats.Token(c.Token))
	case c.User != "":
		opts = append(opts, nats.UserInfo(c.User, c.Password))
	case c.CredentialsFile != "":
		opts = append(opts, nats.UserCredentials(c.CredentialsFile))
	}
	if c.CAFile != "" {
		opts = append(opts, nats.RootCAs(c.CAFile))
	}
	if c.CertFile != "" {
		opts = append(opts, nats.ClientCert(c.CertFile, c.KeyFile))
	}
	return opts
}

// Name is the source's name, its metrics' source label.
func (s *Source) Name() string { return s.cfg.Name }

// Ready reports nil when the source is connected and its stream and
// consumer are set up, else why not. The message names no host or user.
func (s *Source) Ready(context.Context) error {
	if !s.nc.IsConnected() {
		return fmt.Errorf("source %s: not connected to nats", s.cfg.Name)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.notReady != nil {
		return fmt.Errorf("source %s: %v", s.cfg.Name, s.notReady)
	}
	return nil
}

func (s *Source) setReady(err error) {
	s.mu.Lock()
	s.notReady = err
	s.mu.Unlock()
	up := 0.0
	if err == nil {
		up = 1
	}
	s.m.up.WithLabelValues(s.cfg.Name).Set(up)
}

// Start runs the source in the background until Stop.
func (s *Source) Start(ctx context.Context) {
	fetchCtx, cancelFetch := context.WithCancel(ctx)
	// Submits in progress outlive the fetch loop: a shutdown lets them
	// commit and be acknowledged, and only Stop's deadline aborts them.
	workCtx, cancelWork := context.WithCancel(context.WithoutCancel(ctx))
	s.cancelFetch, s.cancelWork = cancelFetch, cancelWork
	go func() {
		defer close(s.done)
		s.run(fetchCtx, workCtx)
	}()
}

// Stop stops fetching, lets the messages in hand commit and be
// acknowledged (messages not started by ctx's deadline are handed back),
// then closes the connection.
func (s *Source) Stop(ctx context.Context) error {
	if s.cancelFetch == nil {
		s.nc.Close()
		return nil
	}
	s.cancelFetch()
	var err error
	select {
	case <-s.done:
	case <-ctx.Done():
		s.cancelWork()
		<-s.done
		err = fmt.Errorf("source %s: stop: %w", s.cfg.Name, ctx.Err())
	}
	s.cancelWork()
	// Flush sends the last acknowledgements before the connection closes.
	if ferr := s.nc.FlushTimeout(2 * time.Second); ferr != nil && s.nc.IsConnected() {
		err = errors.Join(err, fmt.Errorf("source %s: flush: %w", s.cfg.Name, ferr))
	}
	s.nc.Close()
	s.setReady(errors.New("stopped"))
	return err
}

// run sets up the stream and consumer, then pulls messages until
// fetchCtx ends and hands each to a worker. A consumer that disappears
// (deleted, or the server lost its state) is set up again.
func (s *Source) run(fetchCtx, workCtx context.Context) {
	work := make(chan jetstream.Msg)
	var wg sync.WaitGroup
	for range s.cfg.Workers {
		wg.Go(func() {
			for msg := range work {
				s.handle(workCtx, msg)
			}
		})
	}
	for fetchCtx.Err() == nil {
		cons := s.setupLoop(fetchCtx)
		if cons == nil {
			break
		}
		lagCtx, stopLag := context.WithCancel(fetchCtx)
		lagDone := make(chan struct{})
		go func() { s.lagLoop(lagCtx, cons); close(lagDone) }()
		s.pull(fetchCtx, cons, work)
		stopLag()
		<-lagDone
	}
	close(work)
	wg.Wait()
}

// pull feeds work from a continuous pull, which keeps up to
// FetchMessages messages and FetchBytes bytes requested ahead, until ctx
// ends (the messages already pulled are still handed out) or the consumer
// is gone.
func (s *Source) pull(ctx context.Context, cons jetstream.Consumer, work chan<- jetstream.Msg) {
	it, err := cons.Messages(jetstream.PullMaxMessagesWithBytesLimit(s.cfg.FetchMessages, s.cfg.FetchBytes))
	if err != nil {
		s.fetchFailed(ctx, err)
		return
	}
	stop := context.AfterFunc(ctx, it.Drain)
	defer stop()
	for {
		msg, err := it.Next()
		switch {
		case errors.Is(err, jetstream.ErrMsgIteratorClosed):
			return
		case errors.Is(err, jetstream.ErrConsumerDeleted) || errors.Is(err, jetstream.ErrConsumerNotFound):
			it.Stop()
			s.fetchFailed(ctx, err)
			return
		case err != nil:
			s.fetchFailed(ctx, err)
			continue
		}
		s.setReady(nil)
		work <- msg
	}
}

// fetchFailed notes a failed pull and pauses before the next one.
func (s *Source) fetchFailed(ctx context.Context, err error) {
	if ctx.Err() != nil {
		return
	}
	s.log.Warn("pull from stream", "err", err)
	if !s.nc.IsConnected() {
		s.setReady(errors.New("not connected to nats"))
	}
	sleep(ctx, retryPause)
}

// setupLoop retries setup until it succeeds or ctx ends (nil then).
func (s *Source) setupLoop(ctx context.Context) jetstream.Consumer {
	for {
		cons, err := s.setup(ctx)
		if err == nil {
			s.setReady(nil)
			s.log.Info("consuming stream", "stream", s.cfg.Stream, "durable", s.cfg.Durable)
			return cons
		}
		if ctx.Err() != nil {
			return nil
		}
		s.setReady(err)
		s.log.Warn("set up stream source", "err", err)
		sleep(ctx, setupRetry)
	}
}

// setup finds or creates the stream and the durable consumer.
func (s *Source) setup(ctx context.Context) (jetstream.Consumer, error) {
	ctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	c := s.cfg
	subjects := []string{c.PredictionsSubject, c.LabelsSubject}
	st, err := s.js.Stream(ctx, c.Stream)
	switch {
	case errors.Is(err, jetstream.ErrStreamNotFound):
		st, err = s.js.CreateStream(ctx, jetstream.StreamConfig{
			Name:        c.Stream,
			Description: "classwatch predictions and labels",
			Subjects:    subjects,
			// Work-queue retention removes a message once acknowledged and
			// keeps every unacknowledged one, however old.
			Retention: jetstream.WorkQueuePolicy,
			Storage:   jetstream.FileStorage,
		})
		if err != nil {
			return nil, fmt.Errorf("create stream %s: %w", c.Stream, err)
		}
	case err != nil:
		return nil, fmt.Errorf("look up stream %s: %w", c.Stream, err)
	}
	if err := checkStreamSubjects(st.CachedInfo().Config.Subjects, subjects); err != nil {
		return nil, fmt.Errorf("stream %s: %w", c.Stream, err)
	}
	cons, err := s.js.Consumer(ctx, c.Stream, c.Durable)
	if errors.Is(err, jetstream.ErrConsumerNotFound) {
		cons, err = s.js.CreateConsumer(ctx, c.Stream, jetstream.ConsumerConfig{
			Durable:       c.Durable,
			Description:   "classwatch replicas",
			AckPolicy:     jetstream.AckExplicitPolicy,
			AckWait:       c.AckWait,
			MaxDeliver:    -1,
			DeliverPolicy: jetstream.DeliverAllPolicy,
		})
	}
	if err != nil {
		return nil, fmt.Errorf("set up consumer %s: %w", c.Durable, err)
	}
	return cons, nil
}

// checkStreamSubjects requires an existing stream to capture both input
// subjects and neither .rejected subject: rejected lines published back
// into the stream would come round again as input.
func checkStreamSubjects(have, want []string) error {
	for _, w := range want {
		if !slices.ContainsFunc(have, func(f string) bool { return subjectMatches(f, w) }) {
			return fmt.Errorf("does not capture subject %s (its subjects: %v)", w, have)
		}
		r := RejectedSubject(w)
		if slices.ContainsFunc(have, func(f string) bool { return subjectMatches(f, r) }) {
			return fmt.Errorf("captures %s, where rejected lines are published; narrow its subjects", r)
		}
	}
	return nil
}

// lagLoop exports the consumer's pending counts every LagEvery.
func (s *Source) lagLoop(ctx context.Context, cons jetstream.Consumer) {
	if s.cfg.LagEvery <= 0 {
		return
	}
	t := time.NewTicker(s.cfg.LagEvery)
	defer t.Stop()
	for {
		s.readLag(ctx, cons)
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

func (s *Source) readLag(ctx context.Context, cons jetstream.Consumer) {
	ctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	info, err := cons.Info(ctx)
	if err != nil {
		if ctx.Err() == nil {
			s.log.Debug("read consumer info", "err", err)
		}
		return
	}
	s.m.pending.WithLabelValues(s.cfg.Name).Set(float64(info.NumPending))
	s.m.ackPending.WithLabelValues(s.cfg.Name).Set(float64(info.NumAckPending))
}

// sleep waits d or until ctx ends.
func sleep(ctx context.Context, d time.Duration) {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
	case <-t.C:
	}
}
