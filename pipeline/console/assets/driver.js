// Driver view: a few channels in figures large enough for arm's length,
// active warnings across the whole screen, the turbo warm-up guard and the
// cool-down countdown.
"use strict";
(() => {
  const { el, pretty, severity, fieldsText } = Plenum;
  const live = new Plenum.Live("/console/stream").start();
  const KEY = "plenum.driver.channels";
  const preferred = ["engine_speed", "boost_pressure", "oil_temp", "coolant_temp", "lambda", "ecu_engine_speed", "ecu_coolant_temperature"];
  const guardNames = new Set(["turbo_warmup_warning", "cooldown_idle_remaining", "safe_to_switch_off", "turbo_thermal_state", "turbo_shutdown_hot"]);

  function chosen() {
    try {
      const s = JSON.parse(localStorage.getItem(KEY) || "null");
      if (Array.isArray(s) && s.length) return s.filter((n) => live.byName.has(n));
    } catch (e) { /* fall through */ }
    const p = preferred.filter((n) => live.byName.has(n)).slice(0, 4);
    if (p.length) return p;
    return live.channels.filter((c) => !c.name.startsWith("warning_")).slice(0, 4).map((c) => c.name);
  }

  const figures = document.getElementById("figures");
  let built = "";
  const cells = new Map();
  function build() {
    const names = chosen();
    const key = names.join(",");
    if (key === built) return;
    built = key;
    figures.replaceChildren();
    cells.clear();
    for (const n of names) {
      const value = el("span", { class: "big" }, "–");
      const unit = el("span", { class: "unit" });
      const note = el("span", { class: "note" });
      const fig = el("figure", { class: "fig", "data-channel": n },
        el("figcaption", {}, pretty(n)), el("div", { class: "reading" }, value, unit), note);
      cells.set(n, { fig, value, unit, note });
      figures.append(fig);
    }
  }

  function renderFigures() {
    for (const [n, c] of cells) {
      const r = live.value(n);
      c.fig.dataset.state = r.state;
      if (r.v) { c.value.textContent = r.v.x; c.unit.textContent = r.v.u; }
      else { c.value.textContent = "–"; c.unit.textContent = r.ch ? r.ch.unit : ""; }
      switch (r.state) {
        case "live": c.note.textContent = ""; break;
        case "stale": c.note.textContent = "⌛ STALE — " + Plenum.ago(r.age / 1000) + " old"; break;
        case "lost": c.note.textContent = "✕ NOT LIVE — connection lost"; break;
        case "bad": c.note.textContent = "⚠ " + r.v.q.replace(/_/g, " ").toUpperCase(); break;
        default: c.note.textContent = "no value yet";
      }
    }
  }

  const alarms = document.getElementById("alarms");
  const ackResults = new Map(); // rule -> what the last acknowledgement got
  function renderAlarms() {
    const ws = [...live.warnings.values()];
    const open = ws.filter((w) => !w.acked);
    alarms.hidden = ws.length === 0;
    alarms.classList.toggle("full", open.length > 0);
    const key = JSON.stringify(ws) + Plenum.token() + JSON.stringify([...ackResults]);
    if (alarms.dataset.key === key) return;
    alarms.dataset.key = key;
    alarms.replaceChildren();
    for (const w of ws) {
      const s = severity(w.severity);
      const ack = el("button", { type: "button", class: "ack", onclick: async () => {
        ack.disabled = true;
        const r = await Plenum.control(live.snap.controls.ack, { rule: w.name });
        ackResults.set(w.name, r.ok ? "acknowledged" : r.text);
        render();
      } }, "Acknowledge");
      const res = el("span", { class: "result" }, ackResults.get(w.name) || "");
      alarms.append(el("article", { class: "alarm sev-" + (w.severity || "warning") + (w.acked ? " acked" : ""), "data-rule": w.name },
        el("div", { class: "sev" }, el("span", { class: "shape", "aria-hidden": "true" }, s.shape), " ", s.word, w.acked ? " · acknowledged, still active" : ""),
        el("h2", {}, pretty(w.name)),
        el("p", { class: "detail" }, fieldsText(w) || "raised"),
        el("p", { class: "since" }, "since " + new Date(w.start || w.end).toLocaleTimeString()),
        w.acked || !Plenum.token() ? null : ack, res));
    }
    // The caution stays in sight while a warning covers the screen.
    if (open.length) alarms.append(el("p", { class: "caution" }, el("strong", {}, "Advisory only — not a safety system."), " Never read this screen while driving on a public road."));
  }

  const guard = document.getElementById("guard");
  function renderGuard() {
    const parts = [];
    const warm = live.value("turbo_warmup_warning");
    if (warm.v && warm.state === "live" && warm.v.v >= 1) parts.push(el("p", { class: "g warm" }, "▲ Warming up: keep the load light until oil is warm"));
    const cool = live.value("cooldown_idle_remaining");
    if (cool.v && cool.state === "live" && cool.v.v > 0) parts.push(el("p", { class: "g cool" }, "◔ Idle " + Math.ceil(cool.v.v) + " s more before switching off"));
    // "Safe to switch off" matters only at idle: not while driving.
    const safe = live.value("safe_to_switch_off");
    const rpm = ["engine_speed", "ecu_engine_speed"].map((n) => live.value(n)).find((r) => r.state === "live");
    const idle = rpm && rpm.v.v < 1300;
    if (idle && safe.v && safe.state === "live" && safe.v.v >= 1 && !(cool.v && cool.v.v > 0)) parts.push(el("p", { class: "g ok" }, "✓ Safe to switch off"));
    guard.replaceChildren(...parts);
  }

  const conn = document.getElementById("conn");
  function render() {
    if (!live.snap) return;
    document.getElementById("vehicle").textContent = live.snap.vehicle || "Plenum";
    build();
    renderFigures();
    renderAlarms();
    renderGuard();
    const c = Plenum.connection(live);
    conn.className = "conn " + c.cls;
    conn.textContent = c.text;
    document.body.classList.toggle("is-lost", live.lost());
  }
  live.onChange(render);
  setInterval(render, 250);

  // The channel picker, saved for this browser.
  const picker = document.getElementById("picker");
  document.getElementById("pick").addEventListener("click", () => {
    const box = document.getElementById("choices");
    const have = new Set(chosen());
    box.replaceChildren(...live.channels.filter((c) => !c.name.startsWith("warning_") && !guardNames.has(c.name)).map((c) =>
      el("label", {}, Object.assign(el("input", { type: "checkbox", value: c.name }), { checked: have.has(c.name) }), " " + pretty(c.name))));
    picker.showModal();
  });
  picker.addEventListener("close", () => {
    const names = [...picker.querySelectorAll("input[type=checkbox]:checked")].map((i) => i.value);
    if (names.length) localStorage.setItem(KEY, JSON.stringify(names));
    built = "";
    render();
  });
  Plenum.tokenBox(document.getElementById("tokenhost"), () => { if (alarms.dataset) alarms.dataset.key = ""; });
  Plenum.keepAwake();
})();
