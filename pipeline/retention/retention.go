// Package retention removes old recorded runs, oldest first, so that the
// recordings fit their disk: by age, by the total size of the runs and,
// while the disk's free space is below the free-space guard, until it is
// above it again. It never removes the run being recorded, nor, when
// pushing is on, a run whose lines the push target has not acknowledged
// (its pushed marker, record.Pushed): such a run is kept over the limits,
// logged once and gauged.
//
// Decide is the pure decision; Keeper lists the runs, decides, removes
// (renaming a run's directory to .removing-<id> first, so that a cut never
// leaves half a run that looks whole) and reports.
package retention

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// Run is what the decision knows of one recorded run.
type Run struct {
	ID      string
	Start   time.Time
	Bytes   int64 // on disk, every file of the run
	Current bool  // being recorded
	Pushed  bool  // the push target acknowledged every line
}

// Policy is what retention keeps. The zero value removes nothing.
type Policy struct {
	MaxTotalBytes int64         // the runs together at most; 0: no bound
	MaxAge        time.Duration // a run older than this (from its start) is removed; 0: no bound
	// NeedPushed: pushing is on, and a run not pushed is never removed.
	NeedPushed bool
}

// Reasons for a removal, and for keeping a run over a limit.
const (
	ReasonAge       = "age"        // older than MaxAge
	ReasonTotalSize = "total_size" // the runs are over MaxTotalBytes
	ReasonFreeSpace = "free_space" // the disk's free space is below the guard
	HeldCurrent     = "current"    // being recorded
	HeldUnpushed    = "unpushed"   // pushing is on and the run is not pushed
)

// Removal is a run to remove and why.
type Removal struct {
	Run    Run
	Age    time.Duration
	Reason string
}

// Held is a run that a limit would remove but that is kept, and why.
type Held struct {
	Run    Run
	Reason string // HeldCurrent or HeldUnpushed
	Limit  string // the reason it would have been removed for
}

// Decide returns the runs to remove, oldest first, and the runs kept
// although a limit would remove them. A run is due when it is older than
// MaxAge, while the runs kept so far are over MaxTotalBytes, or while
// needFree (bytes the free-space guard wants freed; 0: none) is not yet
// covered by what is removed. The run being recorded and, with NeedPushed,
// the runs not pushed are held instead.
func Decide(runs []Run, p Policy, now time.Time, needFree int64) ([]Removal, []Held) {
	rs := append([]Run(nil), runs...)
	sort.SliceStable(rs, func(i, j int) bool {
		if !rs[i].Start.Equal(rs[j].Start) {
			return rs[i].Start.Before(rs[j].Start)
		}
		return rs[i].ID < rs[j].ID
	})
	var total int64
	for _, r := range rs {
		total += r.Bytes
	}
	var remove []Removal
	var held []Held
	for _, r := range rs {
		age := now.Sub(r.Start)
		reason := ""
		switch {
		case p.MaxAge > 0 && age > p.MaxAge:
			reason = ReasonAge
		case p.MaxTotalBytes > 0 && total > p.MaxTotalBytes:
			reason = ReasonTotalSize
		case needFree > 0:
			reason = ReasonFreeSpace
		}
		if reason == "" {
			continue
		}
		switch {
		case r.Current:
			held = append(held, Held{Run: r, Reason: HeldCurrent, Limit: reason})
			continue
		case p.NeedPushed && !r.Pushed:
			held = append(held, Held{Run: r, Reason: HeldUnpushed, Limit: reason})
			continue
		}
		remove = append(remove, Removal{Run: r, Age: age, Reason: reason})
		total -= r.Bytes
		needFree -= r.Bytes
	}
	return remove, held
}

// Config configures a Keeper.
type Config struct {
	Dir    string // the record directory, one subdirectory per run
	Policy Policy
	// MinFreeBytes is the free-space guard: while the disk has less free
	// space, the oldest runs that may go are removed until it has this
	// much. 0: free space is not looked at.
	MinFreeBytes int64
	// Every is how often a pass runs; 0: one minute. Free space is looked
	// at as often.
	Every time.Duration
	// Clock gives the time and the waits; nil: the system clock.
	Clock clock.Clock
	// Current returns the id of the run being recorded, or ""; nil: none.
	Current func() string
	// DiskSpace returns the free space and the size of dir's filesystem;
	// nil: free space is not looked at.
	DiskSpace func(dir string) (free, total uint64, err error)
	// Log receives each removal and each run held; nil: discarded.
	Log *slog.Logger
}

// Keeper applies the policy to the runs under Dir. Its methods are safe
// for concurrent use; Run is called once.
type Keeper struct {
	cfg  Config
	kick chan struct{}

	mu         sync.Mutex // one pass at a time; guards heldLogged
	heldLogged map[string]bool

	removed, removedBytes, failures, heldTotal atomic.Uint64
	heldNow, heldBytes, runs, runBytes         atomic.Int64
}

// New returns a keeper; nothing is removed until Run or Pass.
func New(cfg Config) *Keeper {
	if cfg.Every <= 0 {
		cfg.Every = time.Minute
	}
	cfg.Clock = clock.Or(cfg.Clock)
	if cfg.Current == nil {
		cfg.Current = func() string { return "" }
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.DiscardHandler)
	}
	return &Keeper{cfg: cfg, kick: make(chan struct{}, 1), heldLogged: map[string]bool{}}
}

// Kick asks for a pass now (a run ended, or was pushed); it never blocks.
func (k *Keeper) Kick() {
	select {
	case k.kick <- struct{}{}:
	default:
	}
}

// Run passes at the start, every Config.Every and on Kick until ctx ends.
// Failures are logged and counted; it returns nil.
func (k *Keeper) Run(ctx context.Context) error {
	for {
		if _, err := k.Pass(); err != nil {
			k.cfg.Log.Error("retention: a pass failed", "dir", k.cfg.Dir, "err", err)
		}
		select {
		case <-ctx.Done():
			return nil
		case <-k.kick:
		case <-k.cfg.Clock.After(k.cfg.Every):
		}
	}
}

// List reads the runs under dir: a subdirectory with a run.json, its start
// from run.json (else the directory's time), its size on disk, whether it
// is marked pushed completely. current is the id being recorded.
func List(dir, current string) ([]Run, error) {
	dirs, err := record.RunDirs(dir)
	if err != nil {
		return nil, fmt.Errorf("retention: %w", err)
	}
	var out []Run
	for _, rd := range dirs {
		id := filepath.Base(rd)
		b, err := os.ReadFile(filepath.Join(rd, "run.json"))
		if err != nil {
			continue // not a run
		}
		var m record.Meta
		r := Run{ID: id, Current: id == current}
		if json.Unmarshal(b, &m) == nil && !m.Start.IsZero() {
			r.Start = m.Start
		} else if st, err := os.Stat(rd); err == nil {
			r.Start = st.ModTime()
		}
		files, _ := os.ReadDir(rd)
		for _, f := range files {
			if info, err := f.Info(); err == nil && info.Mode().IsRegular() {
				r.Bytes += info.Size()
			}
		}
		_, r.Pushed = record.Pushed(rd)
		out = append(out, r)
	}
	return out, nil
}

// Pass lists the runs, decides and removes; it returns what it removed.
func (k *Keeper) Pass() ([]Removal, error) {
	k.mu.Lock()
	defer k.mu.Unlock()
	if k.cfg.Dir == "" {
		return nil, nil
	}
	k.clearLeftovers()
	var needFree int64
	var free uint64
	if k.cfg.DiskSpace != nil && k.cfg.MinFreeBytes > 0 {
		f, _, err := k.cfg.DiskSpace(k.cfg.Dir)
		if err == nil && f < uint64(k.cfg.MinFreeBytes) {
			needFree = k.cfg.MinFreeBytes - int64(f)
		}
		free = f
	}
	runs, err := List(k.cfg.Dir, k.cfg.Current())
	if err != nil {
		k.failures.Add(1)
		return nil, err
	}
	remove, held := Decide(runs, k.cfg.Policy, k.cfg.Clock.Now(), needFree)
	var errs []error
	var done []Removal
	gone := map[string]bool{}
	for _, r := range remove {
		if err := k.remove(r.Run.ID); err != nil {
			k.failures.Add(1)
			errs = append(errs, err)
			continue
		}
		gone[r.Run.ID] = true
		done = append(done, r)
		k.cfg.Log.Info("retention: run removed", "run", r.Run.ID, "age", r.Age.Round(time.Second),
			"bytes", r.Run.Bytes, "reason", r.Reason, "free_bytes", free)
		k.removedBytes.Add(uint64(r.Run.Bytes))
		k.removed.Add(1)
	}
	var heldN, heldB int64
	heldNow := map[string]bool{}
	for _, h := range held {
		if h.Reason != HeldUnpushed {
			continue
		}
		heldN++
		heldB += h.Run.Bytes
		heldNow[h.Run.ID] = true
		if !k.heldLogged[h.Run.ID] {
			k.heldTotal.Add(1)
			k.cfg.Log.Warn("retention: a run over the limit is kept because its lines have not all been pushed",
				"run", h.Run.ID, "bytes", h.Run.Bytes, "limit", h.Limit)
		}
	}
	k.heldLogged = heldNow // a run held again after it was pushed or removed is logged again
	var n, b int64
	for _, r := range runs {
		if !gone[r.ID] {
			n++
			b += r.Bytes
		}
	}
	k.runs.Store(n)
	k.runBytes.Store(b)
	k.heldNow.Store(heldN)
	k.heldBytes.Store(heldB)
	return done, errors.Join(errs...)
}

// remove takes a run out of the listing at once (a rename) and then
// deletes its files.
func (k *Keeper) remove(id string) error {
	from := filepath.Join(k.cfg.Dir, id)
	to := filepath.Join(k.cfg.Dir, ".removing-"+id)
	if err := os.Rename(from, to); err != nil {
		return fmt.Errorf("retention: removing run %s: %w", id, err)
	}
	if err := os.RemoveAll(to); err != nil {
		return fmt.Errorf("retention: removing run %s: %w", id, err)
	}
	return nil
}

// clearLeftovers deletes what a cut left of earlier removals.
func (k *Keeper) clearLeftovers() {
	left, _ := filepath.Glob(filepath.Join(k.cfg.Dir, ".removing-*"))
	for _, l := range left {
		if err := os.RemoveAll(l); err != nil {
			k.failures.Add(1)
			k.cfg.Log.Error("retention: removing what a cut left of a removal", "dir", l, "err", err)
		}
	}
}

// Report says what retention did: Kind "retention", Name "record";
// counters removed_runs, removed_bytes, failures (removals and passes that
// failed), held_unpushed (runs kept over a limit because not pushed, each
// counted once); gauges runs and run_bytes (after the last pass),
// held_unpushed_runs and held_unpushed_bytes (now). Up while the last
// pass held nothing unpushed and no removal failed since the start.
func (k *Keeper) Report() pipeline.HealthReport {
	return pipeline.HealthReport{
		Kind: "retention",
		Name: "record",
		Up:   k.heldNow.Load() == 0 && k.failures.Load() == 0,
		Counters: []pipeline.NamedCount{
			{Name: "removed_runs", Value: k.removed.Load()},
			{Name: "removed_bytes", Value: k.removedBytes.Load()},
			{Name: "failures", Value: k.failures.Load()},
			{Name: "held_unpushed", Value: k.heldTotal.Load()},
		},
		Gauges: []pipeline.NamedValue{
			{Name: "runs", Value: float64(k.runs.Load())},
			{Name: "run_bytes", Value: float64(k.runBytes.Load())},
			{Name: "held_unpushed_runs", Value: float64(k.heldNow.Load())},
			{Name: "held_unpushed_bytes", Value: float64(k.heldBytes.Load())},
		},
	}
}
