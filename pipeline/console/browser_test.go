package console

import (
	"context"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/plenum-engine/plenum/pipeline"
)

// The browser tests drive Debian's chromium, headless, from Go. They skip
// when it is not installed, unless PLENUM_INTEGRATION=1 (as in .ci/run),
// when its absence is a failure. Screenshots go to t.TempDir(), or to
// PLENUM_CONSOLE_SHOTS when set (a directory outside the repository), to be
// looked at by a person.

func chromiumPath(t testing.TB) string {
	t.Helper()
	for _, n := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(n); err == nil {
			return p
		}
	}
	if os.Getenv("PLENUM_INTEGRATION") == "1" {
		t.Fatal("PLENUM_INTEGRATION=1 but chromium is not installed (apt-get install -y chromium)")
	}
	t.Skip("browser test: chromium is not installed (apt-get install -y chromium); with PLENUM_INTEGRATION=1 this fails instead")
	return ""
}

// page is one headless browser tab and the console messages it wrote.
type page struct {
	t    testing.TB
	ctx  context.Context
	mu   sync.Mutex
	msgs []string
	dir  string
}

func newPage(t testing.TB, w, h int) *page {
	t.Helper()
	exe := chromiumPath(t)
	opts := append(chromedp.DefaultExecAllocatorOptions[:], chromedp.ExecPath(exe), chromedp.NoSandbox,
		chromedp.WindowSize(w, h), chromedp.Flag("disable-gpu", true), chromedp.Flag("disable-dev-shm-usage", true))
	actx, cancelA := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancelC := chromedp.NewContext(actx)
	ctx, cancelT := context.WithTimeout(ctx, 90*time.Second)
	t.Cleanup(func() { cancelT(); cancelC(); cancelA() })
	pg := &page{t: t, ctx: ctx, dir: t.TempDir()}
	if d := os.Getenv("PLENUM_CONSOLE_SHOTS"); d != "" {
		pg.dir = d
	}
	msgs := chromedp.Console(ctx)
	go func() {
		for m, err := range msgs {
			if err != nil {
				return
			}
			if m.Type == chromedp.ConsoleError || m.IsException() {
				pg.mu.Lock()
				pg.msgs = append(pg.msgs, m.String())
				pg.mu.Unlock()
			}
		}
	}()
	pg.do(chromedp.EmulateViewport(int64(w), int64(h), chromedp.EmulateScale(1)))
	return pg
}

func (pg *page) do(a ...chromedp.Action[chromedp.Void]) {
	pg.t.Helper()
	if err := chromedp.Do(pg.ctx, a...); err != nil {
		pg.t.Fatal(err)
	}
}

// until waits until the JavaScript expression is truthy.
func (pg *page) until(what, expr string, timeout time.Duration) {
	pg.t.Helper()
	if _, err := chromedp.Run(pg.ctx, chromedp.Poll[chromedp.Void](expr, chromedp.WithPollingTimeout(timeout), chromedp.WithPollingInterval(20*time.Millisecond))); err != nil {
		text, _ := chromedp.Run(pg.ctx, chromedp.Evaluate[string](`document.body.innerText.slice(0, 1500)`))
		pg.t.Fatalf("waiting until %s (%s): %v\nthe page's text then:\n%s", what, expr, err, text)
	}
}

func evalAs[T any](pg *page, expr string) T {
	pg.t.Helper()
	v, err := chromedp.Run(pg.ctx, chromedp.Evaluate[T](expr))
	if err != nil {
		pg.t.Fatalf("%s: %v", expr, err)
	}
	return v
}

func (pg *page) shot(name string) {
	pg.t.Helper()
	b, err := chromedp.Run(pg.ctx, chromedp.FullScreenshot(100))
	if err != nil {
		pg.t.Fatal(err)
	}
	p := filepath.Join(pg.dir, name+".png")
	if err := os.WriteFile(p, b, 0o644); err != nil {
		pg.t.Fatal(err)
	}
	pg.t.Logf("screenshot %s", p)
}

func (pg *page) errors() []string {
	pg.mu.Lock()
	defer pg.mu.Unlock()
	return append([]string(nil), pg.msgs...)
}

func (pg *page) noHorizontalScroll(when string) {
	pg.t.Helper()
	if w := evalAs[[]int](pg, `[document.documentElement.scrollWidth, document.documentElement.clientWidth]`); w[0] > w[1] {
		pg.t.Errorf("%s: horizontal scroll (content %d px wide in a %d px viewport)", when, w[0], w[1])
	}
}

// feeder puts changing values of the rig's channels every 50 ms until
// stopped.
type feeder struct{ stop, done chan struct{} }

func (r *rig) feed() *feeder {
	f := &feeder{make(chan struct{}), make(chan struct{})}
	go func() {
		defer close(f.done)
		tk := time.NewTicker(50 * time.Millisecond)
		defer tk.Stop()
		for i := 0; ; i++ {
			now := time.Now()
			for _, s := range []pipeline.Sample{
				{Channel: r.ids["engine_speed"], Value: 900 + float64(i*53%5800), Time: now},
				{Channel: r.ids["boost_pressure"], Value: -30000 + float64(i*911%150000), Time: now},
				{Channel: r.ids["oil_temp"], Value: 60 + float64(i%400)/10, Time: now},
				{Channel: r.ids["coolant_temp"], Value: 85.5, Time: now},
				{Channel: r.ids["cooldown_idle_remaining"], Value: 40, Time: now},
			} {
				r.p.Process(s)
			}
			select {
			case <-f.stop:
				return
			case <-tk.C:
			}
		}
	}()
	return f
}

func (f *feeder) halt() { close(f.stop); <-f.done }

// ackAPI stands in for pipeline/runs' acknowledge endpoint: it checks the
// bearer token and emits the acknowledgement.
func (r *rig) ackAPI(token string, got *[]string, mu *sync.Mutex) {
	r.mux.HandleFunc("POST "+AckPath, func(w http.ResponseWriter, req *http.Request) {
		mu.Lock()
		*got = append(*got, req.Header.Get("Authorization"))
		mu.Unlock()
		if req.Header.Get("Authorization") != "Bearer "+token {
			http.Error(w, "unauthorized", http.StatusUnauthorized)
			return
		}
		now := time.Now()
		r.p.Emit(pipeline.Event{Kind: "warning_acknowledged", Name: req.FormValue("rule"), Start: now, End: now})
		w.Write([]byte(`{"ok":true}`))
	})
}

// TestBrowserDriver: the driver view in a phone-sized headless Chromium:
// it loads without console errors, values change, a warning raised appears
// within 1 s and clears, acknowledging sends the typed token, no
// horizontal scroll at 390×844, a value that stops updating shows stale,
// and a stream that stops shows "connection lost".
func TestBrowserDriver(t *testing.T) {
	r := newRig(t, Config{Controls: true}, false)
	var mu sync.Mutex
	var auths []string
	r.ackAPI("tok-42", &auths, &mu)
	f := r.feed()
	defer func() {
		select {
		case <-f.done:
		default:
			f.halt()
		}
	}()
	pg := newPage(t, 390, 844)
	pg.do(chromedp.Navigate(r.http.URL + "/console/driver"))
	big := `document.querySelector('.fig[data-channel="engine_speed"] .big')`
	pg.until("engine speed is live", `document.querySelector('.fig[data-channel="engine_speed"]')?.dataset.state === "live"`, 10*time.Second)
	first := evalAs[string](pg, big+`.textContent`)
	pg.until("engine speed changes", big+`.textContent !== "`+first+`"`, 5*time.Second)
	pg.until("the cool-down countdown shows", `document.querySelector('#guard .cool')?.textContent.includes("Idle 40 s more")`, 5*time.Second)
	if c := evalAs[string](pg, `document.querySelector('.caution').textContent`); !strings.Contains(c, "not a safety system") || !strings.Contains(c, "public road") {
		t.Errorf("caution: %q", c)
	}
	pg.noHorizontalScroll("live values")
	pg.shot("driver-live-390x844")

	// A warning raised appears within 1 s, fills the screen, and says its
	// severity in words and a shape.
	// The page notes when a warning first shows and when the last one goes,
	// by its own clock (the same machine's), so that the time the test
	// takes to ask does not count.
	pg.do(chromedp.Evaluate[chromedp.Void](`window.shownAt = {}; window.goneAt = 0;
		new MutationObserver(() => {
			for (const a of document.querySelectorAll('#alarms.full article[data-rule]')) window.shownAt[a.dataset.rule] ??= Date.now();
			if (document.querySelector('#alarms article') === null) window.goneAt ||= Date.now(); else window.goneAt = 0;
		}).observe(document.getElementById("alarms"), {childList: true, subtree: true, attributes: true})`))
	raised := time.Now()
	r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "oil_temp_high", Start: raised, End: raised,
		Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 1, "value": 131.4, "limit": 125}})
	shown, err := chromedp.Run(pg.ctx, chromedp.Poll[int64](`window.shownAt["oil_temp_high"]`, chromedp.WithPollingTimeout(5*time.Second)))
	if err != nil {
		t.Fatalf("the warning never showed: %v", err)
	}
	if d := time.UnixMilli(shown).Sub(raised); d > time.Second {
		t.Errorf("warning banner %v after its event, want within 1 s", d)
	} else {
		t.Logf("warning banner %v after its event", d)
	}
	txt := evalAs[string](pg, `document.querySelector('#alarms article').innerText`)
	for _, want := range []string{"ALERT", "◆", "Oil temp high", "value 131.4", "limit 125"} {
		if !strings.Contains(txt, want) {
			t.Errorf("warning text %q lacks %q", txt, want)
		}
	}
	if evalAs[bool](pg, `document.querySelector('#alarms .ack') !== null`) {
		t.Error("an acknowledge button without a control token")
	}
	pg.noHorizontalScroll("a warning on screen")
	pg.shot("driver-warning-390x844")

	// With the token typed, acknowledging sends it in the header.
	pg.do(chromedp.Evaluate[chromedp.Void](`sessionStorage.setItem("plenum.control_token", "tok-42"); document.getElementById("alarms").dataset.key = ""`))
	pg.until("the acknowledge button shows", `document.querySelector('#alarms .ack') !== null`, 5*time.Second)
	pg.do(chromedp.Click(`#alarms .ack`))
	pg.until("the warning is acknowledged", `document.querySelector('#alarms article.acked') !== null && !document.getElementById("alarms").classList.contains("full")`, 5*time.Second)
	mu.Lock()
	if len(auths) != 1 || auths[0] != "Bearer tok-42" {
		t.Errorf("acknowledge carried %q", auths)
	}
	mu.Unlock()
	if strings.Contains(evalAs[string](pg, `location.href + document.cookie`), "tok-42") {
		t.Error("the token is in the URL or a cookie")
	}
	// A wrong token is refused by the API and the page says so.
	r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "boost_high", Start: raised, End: raised, Tags: map[string]string{"severity": "warning"}})
	pg.until("the second warning shows", `document.querySelector('#alarms article[data-rule="boost_high"] .ack') !== null`, 5*time.Second)
	pg.do(chromedp.Evaluate[chromedp.Void](`sessionStorage.setItem("plenum.control_token", "wrong")`))
	// The list is drawn anew once it sees the new token; a click while it
	// is redrawn can land on a button just taken away.
	pg.until("the list is drawn with the new token", `document.getElementById("alarms").dataset.key.includes("]wrong[")`, 5*time.Second)
	pg.do(chromedp.Click(`#alarms article[data-rule="boost_high"] .ack`))
	pg.until("the refusal shows", `document.querySelector('#alarms article[data-rule="boost_high"] .result')?.textContent.startsWith("401")`, 5*time.Second)

	cleared := time.Now()
	r.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: "oil_temp_high", Start: raised, End: cleared})
	r.p.Emit(pipeline.Event{Kind: "warning_cleared", Name: "boost_high", Start: raised, End: cleared})
	pg.until("the warnings clear", `document.querySelector('#alarms article') === null && document.getElementById("alarms").hidden`, 5*time.Second)
	if d := time.UnixMilli(evalAs[int64](pg, `window.goneAt`)).Sub(cleared); d > time.Second {
		t.Errorf("warnings cleared from the page %v after their events, want within 1 s", d)
	}

	if errs := pg.errors(); len(errs) > 0 {
		// The refused acknowledgement's 401 is the only error expected.
		for _, e := range errs {
			if !strings.Contains(e, "401") {
				t.Errorf("console error: %s", e)
			}
		}
	}

	// Values that stop updating show stale, never live-looking.
	f.halt()
	pg.until("engine speed shows stale", `document.querySelector('.fig[data-channel="engine_speed"]').dataset.state === "stale"`, 6*time.Second)
	if n := evalAs[string](pg, `document.querySelector('.fig[data-channel="engine_speed"] .note').textContent`); !strings.Contains(n, "STALE") {
		t.Errorf("stale note %q", n)
	}
	pg.until("the cool-down countdown goes with its value", `document.querySelector('#guard .cool') === null`, 5*time.Second)
	pg.shot("driver-stale-390x844")

	// The stream stops: the page says the connection is lost.
	r.shutdown()
	pg.until("connection lost shows", `document.body.classList.contains("is-lost") && document.querySelector('.fig[data-channel="engine_speed"]').dataset.state === "lost"`, 6*time.Second)
	if c := evalAs[string](pg, `document.getElementById("conn").textContent`); !strings.Contains(c, "Connection lost") {
		t.Errorf("connection badge %q", c)
	}
	pg.noHorizontalScroll("connection lost")
	pg.shot("driver-lost-390x844")
}

// TestBrowserWallAndCell: the wall view at 1920×1080 shows this vehicle's
// tile with live values, and the cell view lists every channel; both load
// without console errors.
func TestBrowserWallAndCell(t *testing.T) {
	r := newRig(t, Config{Vehicle: "brackenfell-rs"}, false)
	f := r.feed()
	defer f.halt()
	now := time.Now()
	r.p.Emit(pipeline.Event{Kind: "turbo_lag", Name: "pull", Start: now, End: now, Fields: map[string]float64{"t90_seconds": 0.62, "boost_final_pascals": 80000}})
	r.p.Emit(pipeline.Event{Kind: "warning_raised", Name: "coolant_high", Start: now, End: now, Tags: map[string]string{"severity": "warning"}, Fields: map[string]float64{"active": 1}})
	pg := newPage(t, 1920, 1080)
	pg.do(chromedp.Navigate(r.http.URL + "/console/wall"))
	pg.until("the tile is live", `document.querySelector('.tile')?.dataset.state === "live" && document.querySelector('.vname').textContent === "brackenfell-rs" && document.querySelector('.tv[data-state="live"]') !== null`, 10*time.Second)
	pg.until("the tile lists the warning", `document.querySelector('.twarn').textContent.includes("Coolant high")`, 5*time.Second)
	pg.noHorizontalScroll("wall")
	pg.shot("wall-1920x1080")

	pg.do(chromedp.Navigate(r.http.URL + "/console/cell"))
	pg.until("every channel is listed", `document.querySelectorAll('#channels tbody tr').length === `+strconv.Itoa(len(rigChannels)), 10*time.Second)
	pg.until("engine speed is live", `document.querySelector('tr[data-channel="engine_speed"]')?.dataset.state === "live"`, 5*time.Second)
	pg.until("the lag event is listed", `document.getElementById("lags").textContent.includes("t90 0.62 s") && document.getElementById("lags").textContent.includes("boost final 80 kPa")`, 5*time.Second)
	if !evalAs[bool](pg, `document.getElementById("start").disabled`) {
		t.Error("run start enabled without a token")
	}
	pg.shot("cell-1920x1080")
	pg.do(chromedp.EmulateViewport(390, 844, chromedp.EmulateScale(1)))
	pg.shot("cell-390x844")
	pg.do(chromedp.Navigate(r.http.URL + "/console/"))
	pg.until("the index lists the views", `document.querySelectorAll('.choice').length === 3`, 5*time.Second)
	pg.noHorizontalScroll("index")
	for _, e := range pg.errors() {
		t.Errorf("console error: %s", e)
	}
}
