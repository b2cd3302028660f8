// Wall view: one tile per vehicle. Each tile follows one stream; today the
// list holds this daemon's own vehicle, and more tiles are added by adding
// streams to it.
"use strict";
(() => {
  const { el, pretty, severity } = Plenum;
  const vehicles = [{ stream: "/console/stream" }];
  const shown = ["engine_speed", "boost_pressure", "oil_temp", "coolant_temp", "lambda", "ecu_engine_speed", "ecu_coolant_temperature"];
  const host = document.getElementById("tiles");

  function tile(spec) {
    const live = new Plenum.Live(spec.stream).start();
    const name = el("h2", { class: "vname" }, spec.name || "…");
    const status = el("p", { class: "tstatus" });
    const run = el("p", { class: "trun" });
    const vals = el("dl", { class: "tvals" });
    const warns = el("ul", { class: "twarn" });
    const t = el("article", { class: "tile" }, el("header", {}, name, status), run, vals, warns);
    host.append(t);
    const render = () => {
      if (live.snap) name.textContent = spec.name || live.snap.vehicle || "vehicle";
      const lost = live.lost();
      t.dataset.state = lost ? "lost" : "live";
      status.textContent = lost ? "✕ QUIET — no data for " + Plenum.ago(live.silentFor()) : "● live";
      run.textContent = live.run ? "◉ Recording " + live.run : "○ Not recording";
      vals.replaceChildren();
      let n = 0;
      for (const c of shown) {
        if (n >= 4) break;
        const r = live.value(c);
        if (r.state === "absent") continue;
        n++;
        const stale = r.state !== "live";
        vals.append(el("div", { class: "tv", "data-state": r.state },
          el("dt", {}, pretty(c)),
          el("dd", {}, r.v ? r.v.x : "–", el("small", {}, " " + (r.v ? r.v.u : r.ch.unit) + (stale ? " · " + r.state.toUpperCase() : "")))));
      }
      warns.replaceChildren(...[...live.warnings.values()].map((w) => {
        const s = severity(w.severity);
        return el("li", { class: "sev-" + (w.severity || "warning") }, s.shape + " " + s.word + " " + pretty(w.name) + (w.acked ? " (acknowledged)" : ""));
      }));
      if (!live.warnings.size) warns.append(el("li", { class: "none" }, "No active warnings"));
    };
    live.onChange(render);
    setInterval(render, 500);
  }
  for (const v of vehicles) tile(v);
  const clock = document.getElementById("clock");
  setInterval(() => { clock.textContent = new Date().toLocaleTimeString(); }, 1000);
  Plenum.keepAwake();
})();
