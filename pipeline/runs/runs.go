// Package runs controls the recording of runs: it owns the recorder's
// subscription and the run being recorded, starts and stops runs at once,
// on command (HTTP with a bearer token, MQTT commands) or by the pull
// trigger, fills in the ambient conditions at the start, and says loudly
// when the recorder cannot keep up.
package runs

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// Config is what the controller needs to know of the recording.
type Config struct {
	Dir         string        // the directory runs are recorded under, one subdirectory each
	Vehicle     string        // written into every run
	SyncEvery   time.Duration // fsync interval; 0: 200 ms
	RotateBytes int64         // segment size; 0: the recorder's default
	ConfigYAML  []byte        // the daemon's configuration, copied into every run
	// Manual: runs start and stop only on command; StartUnlessManual does
	// nothing.
	Manual bool
	// AutoTrigger starts a run at wide-open throttle with engine speed
	// rising and ends it once the throttle has been closed for 2 s.
	AutoTrigger bool
	// ControlToken enables the run commands of the HTTP API (as a bearer
	// token) and guards the MQTT commands (as their token key). Empty: the
	// HTTP commands are off and MQTT commands need no token.
	ControlToken string
}

// Subscription is the recorder's queue of samples and events: a ring that
// drops and counts rather than block the pipeline.
type Subscription interface {
	C() <-chan struct{}
	Drain(dst []pipeline.Sample, evs []pipeline.Event) ([]pipeline.Sample, []pipeline.Event)
	Dropped() uint64
}

// Latest gives the latest value of a channel.
type Latest interface {
	Get(id pipeline.ChannelID) pipeline.Value
}

// Deps are the parts of the daemon the controller works with. Registry and
// Sub are required; the rest have useful defaults.
type Deps struct {
	Registry *pipeline.Registry
	Sub      Subscription
	Store    Latest               // latest values for the conditions at the start; nil: entered values only
	Emit     func(pipeline.Event) // run_started, run_ended, recorder_behind; nil: dropped
	Publish  func([]byte)         // the run summary, at least once; nil: not published (see SetPublish)
	Forward  record.Forwarder     // the push backlog; nil: none
	Log      *slog.Logger         // nil: discarded
	Now      func() time.Time     // the clock; nil: time.Now
}

// Controller owns the recorder subscription and the run being recorded.
// Every sample between a start and a stop is recorded; at the stop the
// summary is written and published. Its methods are safe for concurrent
// use; Run is called once.
type Controller struct {
	cfg     Config
	reg     *pipeline.Registry
	sub     Subscription
	store   Latest
	emit    func(pipeline.Event)
	forward record.Forwarder
	log     *slog.Logger
	now     func() time.Time

	mu      sync.Mutex // guards everything below
	publish func([]byte)
	cur     *record.Recorder
	auto    bool  // the current run was started by the pull trigger
	syncErr error // the first sync failure, logged once

	// What the recorder failed to keep: samples its subscription dropped
	// and points the disk refused. A rise raises recorder_behind.
	lostClosed    uint64 // Lost() of runs already closed
	writtenClosed uint64 // Points() of runs already closed
	lossSeen      uint64
	lossRaised    bool
	lossSince     time.Time
}

// New returns a controller recording from d.Sub into cfg.Dir. No run is
// being recorded until Start or StartUnlessManual.
func New(cfg Config, d Deps) *Controller {
	c := &Controller{cfg: cfg, reg: d.Registry, sub: d.Sub, store: d.Store, emit: d.Emit, publish: d.Publish,
		forward: d.Forward, log: d.Log, now: d.Now}
	if c.emit == nil {
		c.emit = func(pipeline.Event) {}
	}
	if c.log == nil {
		c.log = slog.New(slog.DiscardHandler)
	}
	if c.now == nil {
		c.now = time.Now
	}
	return c
}

// SetPublish sets where run summaries are published, for a publisher that
// is built after the controller (it takes the controller's Command).
func (c *Controller) SetPublish(f func([]byte)) {
	c.mu.Lock()
	c.publish = f
	c.mu.Unlock()
}

// StartRequest is what a start command may carry.
type StartRequest struct {
	Label, Notes string
	Entered      record.Conditions // values entered with the command win over sensors
	// By says who asked, for the log: "http", "mqtt", "trigger",
	// "start-up" ("" for a caller that does not say).
	By string
}

// StartUnlessManual starts the daemon's one run at once, unless
// Config.Manual is set; it returns the run's id, or "" when manual.
func (c *Controller) StartUnlessManual() (string, error) {
	if c.cfg.Manual {
		return "", nil
	}
	return c.Start(StartRequest{By: "start-up"})
}

// Start opens a new run and returns its id. It fails when a run is already
// being recorded.
func (c *Controller) Start(req StartRequest) (string, error) {
	return c.start(req, false)
}

func (c *Controller) start(req StartRequest, auto bool) (string, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur != nil {
		return "", fmt.Errorf("run %s is already being recorded", c.cur.ID())
	}
	now := c.now()
	id := now.UTC().Format("20060102T150405.000Z")
	rec, err := record.Open(record.Config{Dir: c.cfg.Dir, Run: id, Vehicle: c.cfg.Vehicle, Label: req.Label, Notes: req.Notes,
		SyncEvery: c.cfg.SyncEvery, RotateBytes: c.cfg.RotateBytes, ConfigYAML: c.cfg.ConfigYAML,
		Conditions: c.conditions(req.Entered, now), Forward: c.forward}, c.reg)
	if err != nil {
		return "", fmt.Errorf("opening run %s: %w", id, err)
	}
	c.cur, c.auto = rec, auto
	c.log.Info("run started", "run", id, "by", req.By, "label", req.Label)
	c.emit(pipeline.Event{Kind: "run_started", Name: id, Start: now, Tags: map[string]string{"label": req.Label}})
	return id, nil
}

// Stop closes the current run, publishes its summary and returns it. With
// no run being recorded it returns an error and an empty summary; a run
// that closed with an error returns both.
func (c *Controller) Stop() (record.Summary, error) { return c.stop("") }

// stop is Stop for the log's "by" (see StartRequest.By; "shutdown" when the
// daemon stops).
func (c *Controller) stop(by string) (record.Summary, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil {
		return record.Summary{}, errors.New("no run is being recorded")
	}
	rec := c.cur
	c.cur, c.auto = nil, false
	err := rec.Close()
	c.lostClosed += rec.Lost()
	c.writtenClosed += rec.Points()
	if n := rec.ForwardFailures(); n > 0 {
		c.log.Error("push: blocks of this run were refused by the push backlog; they are in the run's files but were not pushed", "run", rec.ID(), "blocks", n)
	}
	sum := rec.Summary()
	if c.publish != nil {
		c.publish(sum.JSON())
	}
	c.log.Info("run stopped", "run", rec.ID(), "by", by, "samples", sum.Samples, "duration", sum.End.Sub(sum.Start).Round(time.Millisecond))
	c.emit(pipeline.Event{Kind: "run_ended", Name: rec.ID(), Start: sum.Start, End: sum.End,
		Fields: map[string]float64{"samples": float64(sum.Samples), "turbo_lag_events": float64(sum.LagEvents), "warnings_raised": float64(sum.WarningsRaised)}})
	if err != nil {
		return sum, fmt.Errorf("closing run %s: %w", rec.ID(), err)
	}
	return sum, nil
}

// Current returns the id of the run being recorded, or "".
func (c *Controller) Current() string {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil {
		return ""
	}
	return c.cur.ID()
}

// Run records until ctx is done, then closes the current run. It syncs the
// run at Config.SyncEvery and, with Config.AutoTrigger, starts and stops
// runs on pulls.
func (c *Controller) Run(ctx context.Context) {
	every := c.cfg.SyncEvery
	if every == 0 {
		every = 200 * time.Millisecond
	}
	tick := time.NewTicker(max(10*time.Millisecond, every))
	defer tick.Stop()
	var buf []pipeline.Sample
	var evs []pipeline.Event
	trig := c.newTrigger()
	drain := func() {
		buf, evs = c.sub.Drain(buf[:0], evs[:0])
		c.mu.Lock()
		if c.cur != nil {
			for _, s := range buf {
				c.cur.Write(s)
			}
			for _, e := range evs {
				c.cur.WriteEvent(e)
			}
		}
		c.mu.Unlock()
		trig.feed(buf)
	}
	for {
		select {
		case <-ctx.Done():
			drain()
			if sum, err := c.stop("shutdown"); err != nil && sum.Run != "" {
				c.log.Error("closing the run", "err", err)
			}
			return
		case <-c.sub.C():
			drain()
		case <-tick.C:
			c.watchLoss(c.now())
			c.sync()
		}
	}
}

// sync hands the current run's buffered lines to the disk and logs the
// first failure.
func (c *Controller) sync() {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil {
		return
	}
	if err := c.cur.Sync(); err != nil && c.syncErr == nil {
		c.syncErr = err
		c.log.Error("recorder cannot write; samples of this run are being lost", "err", err)
	}
}

// trigger starts a run when a pull begins and stops the run it started
// when the pull ends.
type trigger struct {
	c            *Controller
	on           bool
	thrID, rpmID pipeline.ChannelID
	thr, rpm     float64
	pull         derive.PullTrigger
}

func (c *Controller) newTrigger() *trigger {
	t := &trigger{c: c}
	thrID, haveThr := c.reg.Lookup("throttle_position")
	rpmID, haveRPM := c.reg.Lookup("engine_speed")
	t.on = c.cfg.AutoTrigger && haveThr && haveRPM
	t.thrID, t.rpmID = thrID, rpmID
	return t
}

func (t *trigger) feed(buf []pipeline.Sample) {
	if !t.on {
		return
	}
	for _, s := range buf {
		if s.Quality != pipeline.OK || (s.Channel != t.thrID && s.Channel != t.rpmID) {
			continue
		}
		if s.Channel == t.thrID {
			t.thr = s.Value
		} else {
			t.rpm = s.Value
		}
		start, end := t.pull.Update(s.Time, t.thr, t.rpm)
		switch {
		case start && t.c.Current() == "":
			if _, err := t.c.start(StartRequest{Label: "pull", Notes: "started by the wide-open-throttle trigger", By: "trigger"}, true); err != nil {
				t.c.log.Error("auto trigger: cannot start a run", "err", err)
			}
		case end:
			t.c.mu.Lock()
			auto := t.c.auto && t.c.cur != nil
			t.c.mu.Unlock()
			if auto {
				if _, err := t.c.stop("trigger"); err != nil {
					t.c.log.Error("auto trigger: closing the run", "err", err)
				}
			}
		}
	}
}

// lost returns what the recorder failed to keep so far; c.mu is held.
func (c *Controller) lost() uint64 {
	n := c.sub.Dropped() + c.lostClosed
	if c.cur != nil {
		n += c.cur.Lost()
	}
	return n
}

// watchLoss says loudly when the recorder cannot keep up: a
// recorder_behind warning (raised at the first loss, cleared after 5 s
// without any) and an error log once per burst. The counts stay in
// plenum_consumer_dropped_samples_total{consumer="recorder"} and in Report.
func (c *Controller) watchLoss(now time.Time) {
	var ev *pipeline.Event
	c.mu.Lock()
	lost := c.lost()
	switch {
	case lost > c.lossSeen:
		if !c.lossRaised {
			c.log.Error("the recorder is not keeping up: samples are being lost", "lost", lost-c.lossSeen)
			ev = &pipeline.Event{Kind: "warning_raised", Name: "recorder_behind", Start: now, End: now,
				Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 1, "lost_samples": float64(lost - c.lossSeen)}}
			c.lossRaised = true
		}
		c.lossSeen, c.lossSince = lost, now
	case c.lossRaised && now.Sub(c.lossSince) >= 5*time.Second:
		ev = &pipeline.Event{Kind: "warning_cleared", Name: "recorder_behind", Start: c.lossSince, End: now,
			Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 0}}
		c.lossRaised = false
	}
	c.mu.Unlock()
	if ev != nil {
		c.emit(*ev)
	}
}

// Report says how the recorder is doing: up while a run is being recorded
// and recorder_behind is not raised; lost_samples counts samples the
// subscription dropped and points the disk refused, written_samples the
// points encoded into run files (samples and the few events), both over
// the daemon's lifetime.
func (c *Controller) Report() pipeline.HealthReport {
	c.mu.Lock()
	defer c.mu.Unlock()
	written := c.writtenClosed
	if c.cur != nil {
		written += c.cur.Points()
	}
	return pipeline.HealthReport{
		Kind: "recorder",
		Name: "recorder",
		Up:   c.cur != nil && !c.lossRaised,
		Counters: []pipeline.NamedCount{
			{Name: "lost_samples", Value: c.lost()},
			{Name: "written_samples", Value: written},
		},
	}
}
