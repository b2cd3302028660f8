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
	"os"
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
	// StartLabel labels the run StartUnlessManual starts (the demo's
	// -label), so that runs recorded one after another can be told apart.
	StartLabel string
	// ControlToken enables the run commands of the HTTP API (as a bearer
	// token) and guards the MQTT commands (as their token key). Empty: the
	// HTTP commands are off and MQTT commands need no token.
	ControlToken string
	// MinFreeBytes is the free-space guard: recorder_behind is raised while
	// the filesystem of Dir has less free space than this, before the disk
	// is full. 0: DefaultMinFreeBytes.
	MinFreeBytes int64
}

// DefaultMinFreeBytes is the free space below which recorder_behind is
// raised: 256 MiB, some 8 minutes of the demo's channels at 100 frames/s
// (0.5 MB of line protocol a second, measured), time for a person to end
// the run or make room before the disk refuses writes. A fixed size rather
// than a share of the disk: what matters is how long the recording can go
// on, not how big the disk is.
const DefaultMinFreeBytes = 256 << 20

// freeCheckEvery is how often the free-space guard looks at the disk.
const freeCheckEvery = time.Second

// Subscription is the recorder's queue of samples and events: a ring that
// drops and counts rather than block the pipeline.
type Subscription interface {
	C() <-chan struct{}
	Drain(dst []pipeline.Sample, evs []pipeline.Event) ([]pipeline.Sample, []pipeline.Event)
	// Dropped counts the samples the queue dropped and those counted
	// with CountLost.
	Dropped() uint64
	// CountLost counts samples taken from the queue that the disk refused.
	CountLost(n uint64)
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
	// Closed is told of every data file a run closed for good (see
	// record.Config.Closed), e.g. the compressor's Closed; must not block.
	// nil: none.
	Closed func(path string)
	// Ended is told the id of every run once it is closed (its files are
	// final), e.g. to mark it for the pusher and to let retention look;
	// must not block. nil: none.
	Ended func(run string)
	Log   *slog.Logger     // nil: discarded
	Now   func() time.Time // the clock; nil: time.Now
	// Create creates the runs' data files; nil: the recorder's default
	// (files on disk). Tests inject a disk that refuses writes.
	Create func(path string) (record.File, error)
	// DiskSpace returns the free space and the size of the filesystem
	// holding dir, for the free-space guard and for what a run holds in
	// memory while the disk refuses writes; nil: statfs (on Linux;
	// elsewhere no guard).
	DiskSpace func(dir string) (free, total uint64, err error)
	// Acknowledge acknowledges a raised warning for the warning/acknowledge
	// command, recording that it came by path via from by; nil: the
	// command answers that no warnings are evaluated.
	Acknowledge func(rule, via, by string) error
	// EnterConditions hands the conditions entered for a run to the power
	// correction (empty: back to the ambient channels) and returns the
	// standard power is corrected to, or "" when no power is derived; nil:
	// entered conditions are only recorded.
	EnterConditions func(record.Conditions) string
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
	closed  func(string)
	ended   func(string)
	log     *slog.Logger
	now     func() time.Time
	create  func(string) (record.File, error)
	space   func(string) (uint64, uint64, error)
	ack     func(rule, via, by string) error
	enter   func(record.Conditions) string

	mu      sync.Mutex // guards everything below
	publish func([]byte)
	cur     *record.Recorder
	auto    bool  // the current run was started by the pull trigger
	syncErr error // the first sync failure of a burst, logged once
	refLog  bool  // the current outage of the disk was logged
	cond    pendingConditions

	// What the recorder failed to keep: samples its subscription dropped
	// and samples the disk refused, which are counted back into the
	// subscription (CountLost) so that its Dropped counts both.
	fedBack       uint64 // samples counted back into the subscription
	queueSeen     uint64 // samples the queue dropped, accounted so far
	diskFed       uint64 // DiskLost() of the current run counted back
	diskClosed    uint64 // DiskLost() of runs already closed
	evLostClosed  uint64 // LostEvents() of runs already closed
	failsClosed   uint64 // WriteFailures() of runs already closed
	writtenClosed uint64 // Points() of runs already closed

	// recorder_behind: raised while samples are being lost, the disk
	// refuses writes or free space is short; cleared 5 s after none is.
	lossSeen   uint64
	lossRaised bool
	lossCause  string
	lossAt     uint64 // Dropped() when it was raised
	lossSince  time.Time

	// The free-space guard.
	freeAt  time.Time // last look
	free    uint64
	freeOK  bool // free is known
	lowFree bool
	freeErr bool // a failure to read it was logged
}

// New returns a controller recording from d.Sub into cfg.Dir. No run is
// being recorded until Start or StartUnlessManual.
func New(cfg Config, d Deps) *Controller {
	c := &Controller{cfg: cfg, reg: d.Registry, sub: d.Sub, store: d.Store, emit: d.Emit, publish: d.Publish,
		forward: d.Forward, closed: d.Closed, ended: d.Ended, log: d.Log, now: d.Now, create: d.Create, space: d.DiskSpace,
		ack: d.Acknowledge, enter: d.EnterConditions}
	if c.cfg.MinFreeBytes == 0 {
		c.cfg.MinFreeBytes = DefaultMinFreeBytes
	}
	if c.space == nil {
		c.space = DiskSpace
	}
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
	return c.Start(StartRequest{By: "start-up", Label: c.cfg.StartLabel})
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
	if err := os.MkdirAll(c.cfg.Dir, 0o755); err != nil {
		return "", fmt.Errorf("opening run %s: %w", id, err)
	}
	_, total, serr := c.space(c.cfg.Dir)
	cond, pending := c.startConditions(req.Entered, now)
	rec, err := record.Open(record.Config{Dir: c.cfg.Dir, Run: id, Vehicle: c.cfg.Vehicle, Label: req.Label, Notes: req.Notes,
		SyncEvery: c.cfg.SyncEvery, RotateBytes: c.cfg.RotateBytes, ConfigYAML: c.cfg.ConfigYAML,
		Conditions: cond, Correction: c.enterConditions(req.Entered), Forward: c.forward, Closed: c.closed, Create: c.create, Now: c.now,
		HoldBytes: holdBytes(total, serr)}, c.reg)
	if err != nil {
		c.enterConditions(record.Conditions{})
		return "", fmt.Errorf("opening run %s: %w", id, err)
	}
	c.account() // what the queue dropped before the run is not the run's
	c.cur, c.auto, c.diskFed, c.refLog = rec, auto, 0, false
	c.cond = pendingConditions{on: pending, since: now, entered: req.Entered}
	c.log.Info("run started", "run", id, "by", req.By, "label", req.Label)
	c.emit(pipeline.Event{Kind: "run_started", Name: id, Start: now, Tags: map[string]string{"label": req.Label}})
	return id, nil
}

// Stop closes the current run, publishes its summary and returns it. With
// no run being recorded it returns an error and an empty summary; a run
// that closed with an error, or lost samples or events (the error wraps
// record.ErrDataLost), returns both, and the error is logged.
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
	c.account() // the queue's drops up to now belong to the run
	c.cond = pendingConditions{}
	err := rec.Close()
	c.account() // what the disk refused at the close
	c.logResumed()
	c.enterConditions(record.Conditions{})
	c.cur, c.auto = nil, false
	c.diskClosed += rec.DiskLost()
	c.evLostClosed += rec.LostEvents()
	c.failsClosed += rec.WriteFailures()
	c.writtenClosed += rec.Points()
	c.diskFed = 0
	if n := rec.ForwardFailures(); n > 0 {
		c.log.Error("push: blocks of this run were refused by the push backlog; they are in the run's files but were not pushed", "run", rec.ID(), "blocks", n)
	}
	sum := rec.Summary()
	if c.ended != nil {
		c.ended(rec.ID())
	}
	if c.publish != nil {
		c.publish(sum.JSON())
	}
	c.log.Info("run stopped", "run", rec.ID(), "by", by, "samples", sum.Samples, "duration", sum.End.Sub(sum.Start).Round(time.Millisecond))
	c.emit(pipeline.Event{Kind: "run_ended", Name: rec.ID(), Start: sum.Start, End: sum.End,
		Fields: map[string]float64{"samples": float64(sum.Samples), "samples_lost": float64(sum.SamplesLost),
			"events_lost": float64(sum.EventsLost), "recording_gaps": float64(sum.Gaps),
			"turbo_lag_events": float64(sum.LagEvents), "warnings_raised": float64(sum.WarningsRaised)}})
	if err != nil {
		c.log.Error("the run ended incomplete", "run", rec.ID(), "samples_written", sum.Samples,
			"samples_lost", sum.SamplesLost, "events_lost", sum.EventsLost, "err", err)
		return sum, fmt.Errorf("closing run %s: %w", rec.ID(), err)
	}
	return sum, nil
}

// Controls reports whether the commands of the HTTP API are on (a control
// token is configured).
func (c *Controller) Controls() bool { return c.cfg.ControlToken != "" }

// Current returns the id of the run being recorded, or "".
func (c *Controller) Current() string {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil {
		return ""
	}
	return c.cur.ID()
}

// Run records until ctx is done, then closes the current run and returns
// what Stop returns for it (nil without one): an error when the run could
// not be closed or lost data. It syncs the run at Config.SyncEvery and,
// with Config.AutoTrigger, starts and stops runs on pulls.
func (c *Controller) Run(ctx context.Context) error {
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
			if sum, err := c.stop("shutdown"); err != nil && sum.Run != "" { // logged by stop
				return err
			}
			return nil
		case <-c.sub.C():
			drain()
		case <-tick.C:
			c.sync()
			now := c.now()
			c.watchLoss(now)
			c.fillConditions(now)
		}
	}
}

// sync hands the current run's buffered lines to the disk. A disk that
// refuses writes is logged once per outage, other failures once per burst.
func (c *Controller) sync() {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.cur == nil {
		return
	}
	err := c.cur.Sync()
	switch {
	case c.cur.Refusing():
		if !c.refLog {
			c.refLog = true
			c.log.Error("the disk refuses writes to the run: holding what it cannot write and retrying; beyond that samples are lost",
				"run", c.cur.ID(), "hold_bytes", c.cur.HoldBytes(), "err", err)
		}
	case err != nil:
		if c.syncErr == nil {
			c.syncErr = err
			c.log.Error("recorder", "run", c.cur.ID(), "err", err)
		}
	default:
		c.syncErr = nil
	}
	c.logResumed()
}

// logResumed logs the disk's outages that ended; c.mu is held.
func (c *Controller) logResumed() {
	if c.cur == nil {
		return
	}
	for _, g := range c.cur.TakeResumed() {
		c.refLog = false
		if g.Samples+g.Events == 0 {
			c.log.Warn("the disk takes writes again; nothing was lost", "run", c.cur.ID(), "refused_for", g.Until.Sub(g.Since))
			continue
		}
		c.log.Error("the disk takes writes again; the gap is written into the run as a recording_gap event", "run", c.cur.ID(),
			"refused_for", g.Until.Sub(g.Since), "lost_samples", g.Samples, "lost_events", g.Events,
			"gap_start", g.Start, "gap_end", g.End)
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
				t.c.stop("trigger") // logs what went wrong
			}
		}
	}
}

// account counts the queue's new drops into the current run and the
// samples the disk refused back into the subscription; c.mu is held.
func (c *Controller) account() {
	if q := c.sub.Dropped() - c.fedBack; q > c.queueSeen {
		if c.cur != nil {
			c.cur.CountDropped(q - c.queueSeen)
		}
		c.queueSeen = q
	}
	if c.cur == nil {
		return
	}
	if d := c.cur.DiskLost(); d > c.diskFed {
		c.sub.CountLost(d - c.diskFed)
		c.fedBack += d - c.diskFed
		c.diskFed = d
	}
}

// holdBytes is what a run holds in memory while the disk refuses writes: a
// quarter of the filesystem at most, so that freeing a quarter of it lets
// the run resume, and no more than record.DefaultHoldBytes.
func holdBytes(total uint64, err error) int {
	if err != nil || total == 0 {
		return record.DefaultHoldBytes
	}
	return int(min(record.DefaultHoldBytes, max(total/4, 64<<10)))
}

// checkFree is the free-space guard: it looks at the disk at most once a
// second; c.mu is held.
func (c *Controller) checkFree(now time.Time) {
	if !c.freeAt.IsZero() && now.Sub(c.freeAt) < freeCheckEvery && now.After(c.freeAt) {
		return
	}
	c.freeAt = now
	free, _, err := c.space(c.cfg.Dir)
	if err != nil {
		if !c.freeErr {
			c.freeErr = true
			c.log.Warn("free-space guard: cannot read the free space of the record directory", "dir", c.cfg.Dir, "err", err)
		}
		c.freeOK, c.lowFree = false, false
		return
	}
	c.freeErr = false
	c.free, c.freeOK = free, true
	c.lowFree = free < uint64(c.cfg.MinFreeBytes)
}

// watchLoss says loudly when the recorder cannot keep everything: a
// recorder_behind warning raised at the first lost sample, the first write
// the disk refuses, or when the free space falls below MinFreeBytes, kept
// raised while any of them lasts and cleared 5 s after; an error log when
// it is raised and a log when it is cleared. The counts are in
// plenum_consumer_dropped_samples_total{consumer="recorder"} and in Report.
func (c *Controller) watchLoss(now time.Time) {
	var ev *pipeline.Event
	c.mu.Lock()
	c.account()
	c.checkFree(now)
	lost := c.sub.Dropped()
	cause := ""
	switch {
	case c.cur != nil && c.cur.Refusing():
		cause = "disk_refuses_writes"
	case lost > c.lossSeen:
		cause = "samples_lost"
	case c.lowFree:
		cause = "disk_almost_full"
	}
	tags := map[string]string{"severity": "critical", "cause": cause}
	switch {
	case cause != "":
		if !c.lossRaised {
			c.log.Error("recorder_behind: the recorder cannot keep every sample", "cause", cause,
				"lost", lost-c.lossSeen, "free_bytes", c.free, "min_free_bytes", c.cfg.MinFreeBytes)
			f := map[string]float64{"active": 1, "lost_samples": float64(lost - c.lossSeen)}
			if c.freeOK {
				f["free_bytes"] = float64(c.free)
			}
			ev = &pipeline.Event{Kind: "warning_raised", Name: "recorder_behind", Start: now, End: now, Tags: tags, Fields: f}
			c.lossRaised, c.lossAt = true, c.lossSeen
		} else if cause != c.lossCause {
			c.log.Error("recorder_behind: still raised", "cause", cause, "lost", lost-c.lossAt, "free_bytes", c.free)
		}
		c.lossCause = cause
		c.lossSeen, c.lossSince = lost, now
	case c.lossRaised && now.Sub(c.lossSince) >= 5*time.Second:
		c.log.Info("recorder_behind cleared: the recorder keeps every sample again", "lost", lost-c.lossAt)
		tags["cause"] = c.lossCause
		ev = &pipeline.Event{Kind: "warning_cleared", Name: "recorder_behind", Start: c.lossSince, End: now,
			Tags: tags, Fields: map[string]float64{"active": 0, "lost_samples": float64(lost - c.lossAt)}}
		c.lossRaised, c.lossCause = false, ""
	}
	c.mu.Unlock()
	if ev != nil {
		c.emit(*ev)
	}
}

// Report says how the recorder is doing: up while a run is being recorded
// and recorder_behind is not raised. Counters, over the daemon's lifetime:
// lost_samples, every sample the recorder lost (dropped by its full queue
// or refused by the disk; the same count as
// plenum_consumer_dropped_samples_total{consumer="recorder"});
// refused_samples, the part of it the disk refused; lost_events, events
// the disk refused; written_samples, the points encoded for run files
// (samples and the few events); write_failures, writes and syncs the disk
// refused. Gauges: unwritten_bytes, held while the disk refuses;
// free_bytes, the free space of the record directory's filesystem (when
// known).
func (c *Controller) Report() pipeline.HealthReport {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.account()
	written, refused, evLost, fails := c.writtenClosed, c.diskClosed, c.evLostClosed, c.failsClosed
	unwritten := 0
	if c.cur != nil {
		written += c.cur.Points()
		refused += c.cur.DiskLost()
		evLost += c.cur.LostEvents()
		fails += c.cur.WriteFailures()
		unwritten = c.cur.Unwritten()
	}
	r := pipeline.HealthReport{
		Kind: "recorder",
		Name: "recorder",
		Up:   c.cur != nil && !c.lossRaised,
		Counters: []pipeline.NamedCount{
			{Name: "lost_samples", Value: c.sub.Dropped()},
			{Name: "refused_samples", Value: refused},
			{Name: "lost_events", Value: evLost},
			{Name: "written_samples", Value: written},
			{Name: "write_failures", Value: fails},
		},
		Gauges: []pipeline.NamedValue{{Name: "unwritten_bytes", Value: float64(unwritten)}},
	}
	if c.freeOK {
		r.Gauges = append(r.Gauges, pipeline.NamedValue{Name: "free_bytes", Value: float64(c.free)})
	}
	return r
}
