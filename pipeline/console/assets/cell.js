// Cell view: every channel with unit, quality and the last minute, the
// turbo-lag events, run control and the last run's summary.
"use strict";
(() => {
  const { el, pretty, severity, fieldsText } = Plenum;
  const live = new Plenum.Live("/console/stream").start();
  const tbody = document.querySelector("#channels tbody");
  const rows = new Map();
  let builtFor = null;

  function build() {
    if (builtFor === live.snap) return;
    builtFor = live.snap;
    tbody.replaceChildren();
    rows.clear();
    for (const c of live.channels) {
      const val = el("td", { class: "num" }, "–");
      const unit = el("td", {}, c.unit);
      const q = el("td", { class: "q" });
      const canvas = el("canvas", { width: "160", height: "28", "aria-hidden": "true" });
      const tr = el("tr", { "data-channel": c.name, title: c.description || "" },
        el("th", { scope: "row" }, pretty(c.name)), val, unit, q, el("td", {}, canvas));
      rows.set(c.id, { tr, val, unit, q, canvas, c });
      tbody.append(tr);
    }
  }

  function spark(canvas, h, now, state) {
    const ctx = canvas.getContext("2d");
    const W = canvas.width, H = canvas.height;
    ctx.clearRect(0, 0, W, H);
    if (!h || h.length < 2) return;
    let lo = Infinity, hi = -Infinity;
    for (const [, v] of h) { lo = Math.min(lo, v); hi = Math.max(hi, v); }
    if (hi === lo) { hi += 1; lo -= 1; }
    ctx.lineWidth = 1.5;
    ctx.strokeStyle = state === "live" ? "#9fd8cb" : "#6b7280";
    if (state !== "live") ctx.setLineDash([3, 3]);
    ctx.beginPath();
    h.forEach(([t, v], i) => {
      const x = W - (now - t) / 60000 * W;
      const y = H - 2 - (v - lo) / (hi - lo) * (H - 4);
      if (i === 0) ctx.moveTo(x, y); else ctx.lineTo(x, y);
    });
    ctx.stroke();
  }

  function renderRows() {
    const now = live.lastServer;
    for (const [id, r] of rows) {
      const s = live.value(r.c.name);
      r.tr.dataset.state = s.state;
      r.val.textContent = s.v ? s.v.x : "–";
      if (s.v) r.unit.textContent = s.v.u;
      let q = "—";
      if (s.state === "live") q = "● ok";
      else if (s.state === "stale") q = "⌛ stale " + Plenum.ago(s.age / 1000);
      else if (s.state === "lost") q = "✕ not live";
      else if (s.state === "bad") q = "⚠ " + s.v.q.replace(/_/g, " ");
      r.q.textContent = q;
      spark(r.canvas, live.history.get(id), now, s.state);
    }
  }

  const warnList = document.getElementById("warnings");
  const ackResults = new Map();
  function renderWarnings() {
    const key = JSON.stringify([...live.warnings.values()]) + Plenum.token() + JSON.stringify([...ackResults]);
    if (warnList.dataset.key === key) return;
    warnList.dataset.key = key;
    warnList.replaceChildren();
    for (const w of live.warnings.values()) {
      const s = severity(w.severity);
      const res = el("span", { class: "result" }, ackResults.get(w.name) || "");
      const ack = el("button", { type: "button", onclick: async () => {
        const r = await Plenum.control(live.snap.controls.ack, { rule: w.name });
        ackResults.set(w.name, r.ok ? "acknowledged" : r.text);
        render();
      } }, "Acknowledge");
      warnList.append(el("li", { class: "sev-" + (w.severity || "warning") + (w.acked ? " acked" : ""), "data-rule": w.name },
        el("strong", {}, s.shape + " " + s.word + " "), pretty(w.name), " ", el("span", { class: "detail" }, fieldsText(w)),
        w.acked ? el("em", {}, " acknowledged") : (Plenum.token() ? ack : null), res));
    }
    if (!live.warnings.size) warnList.append(el("li", { class: "none" }, "None active."));
  }

  const lags = document.getElementById("lags");
  function renderEvents() {
    const ls = live.events.filter((e) => e.kind === "turbo_lag").slice(-8).reverse();
    const key = JSON.stringify(ls);
    if (lags.dataset.key !== key) {
      lags.dataset.key = key;
      lags.replaceChildren(...ls.map((e) => el("li", {}, new Date(e.end).toLocaleTimeString() + " — " + (fieldsText(e) || pretty(e.name)))));
      if (!ls.length) lags.append(el("li", { class: "none" }, "None yet."));
    }
    document.getElementById("runstate").textContent = live.run ? "◉ Recording run " + live.run : "○ No run is being recorded.";
    const sum = document.getElementById("summary");
    if (live.lastSummary && sum.dataset.run !== live.lastSummary.name) {
      sum.dataset.run = live.lastSummary.name;
      sum.textContent = live.lastSummary.name + ": " + (fieldsText(live.lastSummary) || "ended");
    }
  }

  const conn = document.getElementById("conn");
  function render() {
    if (!live.snap) return;
    document.getElementById("vehicle").textContent = live.snap.vehicle || "Plenum";
    build();
    renderRows();
    renderWarnings();
    renderEvents();
    const c = Plenum.connection(live);
    conn.className = "conn " + c.cls;
    conn.textContent = c.text;
    document.body.classList.toggle("is-lost", live.lost());
    const enabled = live.snap.controls.enabled && Plenum.token();
    for (const b of document.querySelectorAll("#start, #stop")) b.disabled = !enabled;
  }
  live.onChange(render);
  setInterval(render, 500);

  const result = document.getElementById("runresult");
  document.getElementById("startform").addEventListener("submit", async (ev) => {
    ev.preventDefault();
    const f = Object.fromEntries([...new FormData(ev.target)].filter(([, v]) => v !== ""));
    const r = await Plenum.control(live.snap.controls.start, f);
    result.textContent = r.ok ? "Started." : r.text;
  });
  document.getElementById("stop").addEventListener("click", async () => {
    const r = await Plenum.control(live.snap.controls.stop, {});
    if (r.ok) {
      result.textContent = "Stopped.";
      try {
        const s = JSON.parse(r.text);
        document.getElementById("summary").textContent = Object.entries(s).map(([k, v]) => pretty(k) + ": " + (typeof v === "object" ? JSON.stringify(v) : v)).join(" · ");
      } catch (e) { /* the summary as text */ }
    } else result.textContent = r.text;
  });
  Plenum.tokenBox(document.getElementById("tokenhost"), () => render());
  if (live.snap && !live.snap.controls.enabled) result.textContent = "Run commands are off on this daemon (no control token configured).";
})();
