// Wall view: one tile per vehicle. This daemon's own vehicle comes from its
// live stream; the vehicles it follows through a shared broker come from
// the fleet stream (/console/fleet), one tile each, stale when the fleet
// has heard nothing from a vehicle for its stale_after, and every tile
// says "lost" when the stream feeding it goes quiet.
"use strict";
(() => {
  const { el, pretty, severity, ago } = Plenum;
  const shown = ["engine_speed", "boost_pressure", "manifold_pressure", "oil_temp", "coolant_temp", "lambda", "ecu_engine_speed", "ecu_coolant_temperature"];
  const host = document.getElementById("tiles");

  function shell(key) {
    const name = el("h2", { class: "vname" }, "…");
    const status = el("p", { class: "tstatus" });
    const run = el("p", { class: "trun" });
    const vals = el("dl", { class: "tvals" });
    const warns = el("ul", { class: "twarn" });
    const t = el("article", { class: "tile", "data-vehicle": key }, el("header", {}, name, status), run, vals, warns);
    return { t, name, status, run, vals, warns };
  }

  function warnList(warns, list) {
    warns.replaceChildren(...list.map((w) => {
      const s = severity(w.severity);
      return el("li", { class: "sev-" + (w.severity || "warning") }, s.shape + " " + s.word + " " + pretty(w.name) + (w.acked ? " (acknowledged)" : ""));
    }));
    if (!list.length) warns.append(el("li", { class: "none" }, "No active warnings"));
  }

  function valueBox(name, x, u, state) {
    const stale = state !== "live";
    return el("div", { class: "tv", "data-state": state },
      el("dt", {}, pretty(name)),
      el("dd", {}, x, el("small", {}, " " + u + (stale ? " · " + state.toUpperCase() : ""))));
  }

  // This daemon's own vehicle, from its live stream.
  function ownTile() {
    const live = new Plenum.Live(Plenum.streamURL("/console/stream")).start();
    const s = shell("");
    s.t.classList.add("own");
    host.prepend(s.t);
    const render = () => {
      if (live.snap) { s.name.textContent = live.snap.vehicle || "this vehicle"; s.t.dataset.vehicle = live.snap.vehicle || ""; }
      const lost = live.lost();
      s.t.dataset.state = lost ? "lost" : "live";
      s.status.textContent = lost ? "✕ QUIET — no data for " + ago(live.silentFor()) : "● live · this daemon";
      s.run.textContent = live.run ? "◉ Recording " + live.run : "○ Not recording";
      s.vals.replaceChildren();
      let n = 0;
      for (const c of shown) {
        if (n >= 4) break;
        const r = live.value(c);
        if (r.state === "absent") continue;
        n++;
        s.vals.append(valueBox(c, r.v ? r.v.x : "–", r.v ? r.v.u : r.ch.unit, r.state));
      }
      warnList(s.warns, [...live.warnings.values()]);
    };
    live.onChange(render);
    setInterval(render, 500);
  }

  // The vehicles followed, from the fleet stream.
  function fleet() {
    const tiles = new Map(); // name -> shell
    let last = null;          // the last "vehicles" message
    let lastMsg = -Infinity;  // performance.now() of the last message
    let lastServer = 0;
    const note = el("p", { class: "fleetnote", hidden: "" });
    host.after(note);
    const lost = () => performance.now() - lastMsg > 2000;
    const render = () => {
      if (!last) return;
      const gone = lost();
      const now = lastServer + (performance.now() - lastMsg); // the daemon's clock, about
      note.hidden = last.following && !gone;
      note.textContent = gone ? "✕ The wall lost its connection to this daemon " + ago((performance.now() - lastMsg) / 1000) + " ago — no tile below is live."
        : "Following no other vehicle (the configuration's follow section is empty).";
      const seen = new Set();
      for (const v of last.vehicles) {
        seen.add(v.name);
        let s = tiles.get(v.name);
        if (!s) { s = shell(v.name); tiles.set(v.name, s); host.append(s.t); }
        s.name.textContent = v.name;
        let state = "live";
        if (gone) state = "lost";
        else if (v.state === "offline") state = "offline";
        else if (v.stale) state = "stale";
        s.t.dataset.state = state;
        const heard = v.heard_ms ? ago((now - v.heard_ms) / 1000) + " ago" : "never (only what the broker kept)";
        s.status.textContent = {
          live: "● live",
          lost: "✕ QUIET — this screen lost its connection",
          offline: "○ OFFLINE — went offline " + ago((now - v.since) / 1000) + " ago",
          stale: "◌ STALE — last heard " + heard,
        }[state];
        s.run.textContent = v.run ? "◉ Recording " + v.run : "○ Not recording";
        s.vals.replaceChildren();
        const byName = new Map(v.values.map((x) => [x.name, x]));
        let picks = shown.filter((c) => byName.has(c));
        if (!picks.length) picks = [...byName.keys()];
        for (const c of picks.slice(0, 4)) {
          const x = byName.get(c);
          let st = state;
          if (st === "live" && x.q !== "ok") st = x.q === "stale" ? "stale" : "bad";
          s.vals.append(valueBox(c, x.x, x.u, st));
        }
        if (!picks.length) s.vals.append(el("p", { class: "none" }, "No values yet"));
        warnList(s.warns, v.warnings);
      }
      for (const [name, s] of tiles) if (!seen.has(name)) { s.t.remove(); tiles.delete(name); }
    };
    let cur = null;
    const start = () => {
      const es = new EventSource(Plenum.streamURL("/console/fleet"));
      cur = es;
      const on = (name, f) => es.addEventListener(name, (m) => {
        let d;
        try { d = JSON.parse(m.data); } catch (e) { return; }
        lastMsg = performance.now();
        if (d.t) lastServer = d.t;
        f(d);
        render();
      });
      on("vehicles", (d) => { last = d; });
      on("heartbeat", () => {});
      es.onerror = () => {
        if (es.readyState === EventSource.CLOSED && es === cur) setTimeout(start, 2000);
        render();
      };
    };
    start();
    Plenum.onUnits(() => { cur.close(); start(); });
    setInterval(render, 500);
  }

  ownTile();
  fleet();
  const clock = document.getElementById("clock");
  const tick = () => { clock.textContent = new Date().toLocaleTimeString(); };
  tick();
  setInterval(tick, 1000);
  Plenum.keepAwake();
})();
