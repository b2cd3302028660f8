package runlist

import (
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/display"
	"github.com/plenum-engine/plenum/pipeline/record"
	"github.com/plenum-engine/plenum/pipeline/sheet"
)

// Every number written for a person goes through the display layer (a
// catalogued channel's quantity gives its unit and precision) or through
// one of the helpers below with a stated number of decimals.

// none is written where a run has no value.
const none = display.NoNumber

// startLayout is how a run's start is written: UTC, to the second.
const startLayout = "2006-01-02 15:04:05 UTC"

// value formats v, a value of the catalogued channel ch in its canonical
// unit, as the display layer shows it.
func value(f display.Formatter, ch string, v float64) string {
	c, ok := pipeline.Catalogued(ch)
	if !ok {
		return strconv.FormatFloat(v, 'f', 2, 64)
	}
	return f.Format(c, v).String()
}

// ptr formats *v as value does; none when v is nil.
func ptr(f display.Formatter, ch string, v *float64) string {
	if v == nil {
		return none
	}
	return value(f, ch, *v)
}

// peak formats p as "221 kW at 6608 rpm".
func peak(f display.Formatter, ch string, p Peak) string {
	if !p.OK {
		return none
	}
	s := value(f, ch, p.Value)
	if !math.IsNaN(p.RPM) {
		s += " at " + value(f, "engine_speed", p.RPM)
	}
	return s
}

// sheetPeak formats a peak of the dyno sheet as "221 kW at 6600 rpm".
func sheetPeak(f display.Formatter, ch string, p sheet.Peak) string {
	return peak(f, ch, Peak{Value: p.Y, RPM: p.X, OK: p.OK})
}

// seconds formats a duration in seconds with d decimals: "2.40 s".
func seconds(s float64, d int) string { return strconv.FormatFloat(s, 'f', d, 64) + " s" }

// duration formats a run's length: "48.3 s", "1 min 02 s", "1 h 05 min".
func duration(d time.Duration) string {
	switch {
	case d <= 0:
		return none
	case d < time.Minute:
		return seconds(d.Seconds(), 1)
	case d < time.Hour:
		s := int(d.Round(time.Second) / time.Second)
		return fmt.Sprintf("%d min %02d s", s/60, s%60)
	}
	m := int(d.Round(time.Minute) / time.Minute)
	return fmt.Sprintf("%d h %02d min", m/60, m%60)
}

// factor formats the correction factor with its range when it varied.
func factor(f display.Formatter, r Run) string {
	if math.IsNaN(r.Factor) {
		return none
	}
	s := value(f, "correction_factor", r.Factor)
	lo, hi := value(f, "correction_factor", r.FactorMin), value(f, "correction_factor", r.FactorMax)
	if lo != hi {
		s += " (mean; " + lo + " to " + hi + ")"
	}
	return s
}

// standardTitles are the correction standards as their documents name
// them (derive.ParseStandard's names).
var standardTitles = map[string]string{"sae_j1349": "SAE J1349", "iso_1585": "ISO 1585", "din_70020": "DIN 70020"}

// standard writes r's standard as its document names it; none when the run
// recorded none.
func standard(r Run) string {
	if t, ok := standardTitles[r.Standard()]; ok {
		return t
	}
	return orNone(r.Standard())
}

// orNone returns s, or none when it is empty.
func orNone(s string) string {
	if s == "" {
		return none
	}
	return s
}

// WriteList writes runs as a table, one line each, in f's units.
func WriteList(w io.Writer, runs []Run, f display.Formatter) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "ID\tLABEL\tVEHICLE\tSTART\tLENGTH\tENDED\tPEAK POWER\tPEAK TORQUE\tSTANDARD\tWARNINGS")
	for _, r := range runs {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%d\n",
			r.Meta.ID, orNone(r.Meta.Label), orNone(r.Meta.Vehicle), r.Meta.Start.UTC().Format(startLayout),
			duration(r.Duration()), r.Ended, peak(f, "corrected_power", r.Power), peak(f, "dyno_torque", r.Torque),
			standard(r), r.Warnings())
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	_, err := fmt.Fprintf(w, "%d run(s); power and torque corrected to the run's standard\n", len(runs))
	return err
}

// WriteShow writes one run's summary for a person, in f's units.
func WriteShow(w io.Writer, r Run, f display.Formatter) error {
	var b strings.Builder
	tw := tabwriter.NewWriter(&b, 0, 0, 2, ' ', 0)
	line := func(k, v string) { fmt.Fprintf(tw, "  %s\t%s\n", k, v) }
	head := func(s string) {
		tw.Flush()
		fmt.Fprintf(tw, "\n%s\n", s)
	}
	fmt.Fprintf(tw, "Run %s\n", r.Meta.ID)
	line("label", orNone(r.Meta.Label))
	line("vehicle", orNone(r.Meta.Vehicle))
	line("start", r.Meta.Start.UTC().Format(startLayout))
	line("length", duration(r.Duration()))
	line("ended", r.Ended.String())
	if r.Summary != nil {
		s := r.Summary
		line("samples", fmt.Sprintf("%d written, %d lost", s.Samples, s.SamplesLost))
		if s.Gaps > 0 || s.EventsLost > 0 {
			line("gaps", fmt.Sprintf("%d recording gap(s), %d event(s) lost", s.Gaps, s.EventsLost))
		}
	}
	notes := strings.Split(strings.TrimSpace(r.Meta.Notes), "\n")
	line("notes", orNone(notes[0]))
	for _, n := range notes[1:] {
		line("", n)
	}

	conditions := func(title string, c *record.Conditions) {
		if c == nil {
			return
		}
		head(fmt.Sprintf("%s (%s)", title, orNone(c.Source)))
		line("air pressure", ptr(f, "baro_pressure", c.PressurePa))
		line("air temperature", ptr(f, "ambient_temp", c.TemperatureC))
		line("relative humidity", ptr(f, "ambient_humidity", c.RelativeHumidity))
		if c.Note != "" {
			line("note", c.Note)
		}
	}
	conditions("Conditions at the start", r.Meta.Conditions)
	if r.Summary != nil {
		conditions("Conditions over the run", r.Summary.Conditions)
	}
	if r.Meta.Conditions == nil && (r.Summary == nil || r.Summary.Conditions == nil) {
		head("Conditions")
		line("", "none recorded")
	}

	head("Power correction")
	line("standard", standard(r))
	line("factor", factor(f, r))
	corr := r.Meta.Correction
	if corr == nil && r.Summary != nil {
		corr = r.Summary.Correction
	}
	switch {
	case corr == nil:
		line("conditions", "not recorded with this run")
	case corr.Entered != nil:
		e := corr.Entered
		line("entered", fmt.Sprintf("%s, %s, %s", ptr(f, "baro_pressure", e.PressurePa), ptr(f, "ambient_temp", e.TemperatureC), ptr(f, "ambient_humidity", e.RelativeHumidity)))
		if corr.Others != "" {
			line("the rest from", corr.Others)
		}
	default:
		line("conditions from", orNone(corr.Others))
	}

	head("Peaks")
	line("corrected power", peak(f, "corrected_power", r.Power))
	line("corrected torque", peak(f, "dyno_torque", r.Torque))
	line("measured torque", peak(f, "dyno_torque", r.MeasuredTorque))
	for i, pp := range r.Pulls {
		line(fmt.Sprintf("pull %d, smoothed", i+1), fmt.Sprintf("%s, %s (raw %s, %s)",
			sheetPeak(f, "corrected_power", pp.Power), sheetPeak(f, "dyno_torque", pp.Torque),
			sheetPeak(f, "corrected_power", pp.RawPower), sheetPeak(f, "dyno_torque", pp.RawTorque)))
	}
	if s := r.Summary; s != nil {
		line("boost", ptr(f, "boost_pressure", s.PeakBoostPa))
		if s.MinLambdaUnderLoad != nil && s.MaxLambdaUnderLoad != nil {
			line("mixture under boost", ptr(f, "lambda", s.MinLambdaUnderLoad)+" to "+ptr(f, "lambda", s.MaxLambdaUnderLoad))
		}
		line("intake air, highest", ptr(f, "intake_air_temp", s.MaxIntakeAirC))
	}

	var lags, raised []pipeline.Event
	for _, e := range r.Events {
		switch e.Kind {
		case "turbo_lag":
			lags = append(lags, e)
		case "warning_raised":
			raised = append(raised, e)
		}
	}
	at := func(t time.Time) string {
		return "+" + seconds(t.Sub(r.Start).Seconds(), 1)
	}
	head(fmt.Sprintf("Turbo lag (%d measured)", len(lags)))
	for _, e := range lags {
		v := func(k string) (float64, bool) { x, ok := e.Fields[k]; return x, ok }
		var parts []string
		if x, ok := v("engine_speed_rpm"); ok {
			parts = append(parts, "from "+value(f, "engine_speed", x))
		}
		if a, ok := v("boost_start_pascals"); ok {
			if z, ok := v("boost_final_pascals"); ok {
				parts = append(parts, "boost "+value(f, "boost_pressure", a)+" to "+value(f, "boost_pressure", z))
			}
		}
		for _, k := range []string{"t50", "t90"} {
			if x, ok := v(k + "_seconds"); ok {
				parts = append(parts, k+" "+seconds(x, 2))
			}
		}
		if x, ok := v("settling_seconds"); ok {
			parts = append(parts, "settled "+seconds(x, 2))
		}
		if x, ok := v("overshoot_ratio"); ok {
			parts = append(parts, "overshoot "+strconv.FormatFloat(100*x, 'f', 1, 64)+" %")
		}
		line(at(e.Start), strings.Join(parts, ", "))
	}
	head(fmt.Sprintf("Warnings (%d raised)", len(raised)))
	for _, e := range raised {
		how := "still raised at the end"
		for _, c := range r.Events {
			if c.Kind == "warning_cleared" && c.Name == e.Name && !c.Start.Before(e.Start) {
				if !c.End.IsZero() {
					how = "raised for " + seconds(c.End.Sub(c.Start).Seconds(), 1)
				} else {
					how = "cleared"
				}
				break
			}
		}
		line(at(e.Start), e.Name+": "+how)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	_, err := io.WriteString(w, b.String())
	return err
}

// WriteSummary writes a run's summary as its recorder wrote it, for a
// person: what `plenum run-stop` prints when a run ends.
func WriteSummary(w io.Writer, s record.Summary, f display.Formatter) error {
	pk := func(ch string, v, rpm *float64) string {
		t := ptr(f, ch, v)
		if v != nil && rpm != nil {
			t += " at " + value(f, "engine_speed", *rpm)
		}
		return t
	}
	_, err := fmt.Fprintf(w, "run %s stopped: %s, %d samples written, %d lost\n"+
		"  peak corrected power  %s\n  peak torque           %s\n  peak boost            %s\n"+
		"  turbo-lag events      %d\n  warnings raised       %d\n",
		s.Run, duration(s.End.Sub(s.Start)), s.Samples, s.SamplesLost,
		pk("corrected_power", s.PeakCorrectedPowerW, s.PeakPowerRPM), pk("dyno_torque", s.PeakTorqueNm, s.PeakTorqueRPM),
		ptr(f, "boost_pressure", s.PeakBoostPa), s.LagEvents, s.WarningsRaised)
	return err
}
