package derive_test

import (
	"math"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/derive/lag"
	"github.com/plenum-engine/plenum/derive/turbo"
	"github.com/plenum-engine/plenum/derive/warn"
)

// BenchmarkAllPerSample runs every derivation and every detector once per
// simulated sample: the per-sample budget target is 1 µs and 0 allocs.
func BenchmarkAllPerSample(b *testing.B) {
	tb := &derive.VETable{
		Speeds:    []float64{1000, 3000, 5000, 7000},
		Pressures: []float64{30000, 100000, 200000},
		Values:    [][]float64{{0.6, 0.8, 0.85}, {0.7, 0.9, 0.95}, {0.7, 0.92, 0.97}, {0.65, 0.88, 0.9}},
	}
	wb := derive.Wideband{VoltsLow: 0, LambdaLow: 0.68, VoltsHigh: 5, LambdaHigh: 1.36}
	ref := derive.StandardDay()
	det, err := lag.NewDetector(lag.Config{})
	if err != nil {
		b.Fatal(err)
	}
	var rules []warn.Rule
	for i, s := range []string{
		"manifold_pressure > 250000 for 500ms clear 240000",
		"lambda > 0.9 clear 0.88 and manifold_pressure > 150000 clear 140000 for 300ms severity critical",
		"intake_air_temperature > 60 for 2s clear 55",
	} {
		r, err := warn.Parse(string(rune('a'+i)), s)
		if err != nil {
			b.Fatal(err)
		}
		rules = append(rules, r)
	}
	eng, err := warn.NewEngine(rules)
	if err != nil {
		b.Fatal(err)
	}
	mapCh, _ := eng.Channel("manifold_pressure")
	lamCh, _ := eng.Channel("lambda")
	iatCh, _ := eng.Channel("intake_air_temperature")
	wu, _ := turbo.NewWarmUp(turbo.WarmUpConfig{})
	cd, _ := turbo.NewCoolDown(turbo.CoolDownConfig{})
	out := make([]warn.Transition, 0, 8)
	t0 := time.Date(2026, 5, 1, 12, 0, 0, 0, time.UTC)
	b.ReportAllocs()
	i := 0
	var sink float64
	for b.Loop() {
		k := i % 600
		tt := float64(k) * 0.01
		thr, mp := 0.1, 100000.0
		if tt > 1 && tt < 5 {
			thr = math.Min(1, 0.1+9*(tt-1))
			mp += 120000 * (1 - math.Exp(-(tt-1)/0.4))
		}
		now := t0.Add(time.Duration(i) * 10 * time.Millisecond)
		rpm := 3000.0
		ve := tb.At(rpm, mp)
		air := derive.SpeedDensity(mp, 35, rpm, 0.002, ve)
		lam := wb.Lambda(2.4)
		fuel := derive.FuelMassFlow(air, lam, 14.7)
		boost := derive.Boost(mp, 101325)
		pr := derive.PressureRatio(mp, derive.CompressorInletPressure(0, false, 101325, 1500))
		sink += derive.FuelVolumeFlow(fuel, 745) + derive.CompressorEfficiency(25, 25+60*pr, pr)
		sink += ref.CorrectedMassFlow(air, 99825, 25) + derive.IntercoolerEffectiveness(110, 45, 25)
		p := derive.PowerFromTorque(250, rpm)
		cp, _ := derive.CorrectedPower(p, derive.SAEJ1349, derive.Ambient{Pressure: 100000, Temperature: 25, Humidity: 0.5})
		sink += cp + derive.BSFC(fuel, p)
		det.Update(now, thr, boost, rpm, 3)
		out = eng.Update(mapCh, now, mp, out[:0])
		out = eng.Update(lamCh, now, lam, out)
		out = eng.Update(iatCh, now, 35, out)
		wu.Update(now, rpm, boost, 80)
		cd.Update(now, rpm, math.NaN(), air)
		i++
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N), "ns/sample")
	_ = sink
}
