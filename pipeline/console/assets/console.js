// Plenum console: the shared part of every view. It keeps one stream per
// vehicle, the latest values with their age judged by the daemon's clock,
// the active warnings, the run, and sends control commands with the token
// the user typed (kept in sessionStorage, never in a URL or a cookie).
"use strict";

const Plenum = (() => {
  const TOKEN_KEY = "plenum.control_token";

  // Live state of one vehicle's stream.
  class Live {
    constructor(url) {
      this.url = url;
      this.snap = null;          // the last snapshot's header fields
      this.channels = [];        // by id
      this.byName = new Map();   // name -> channel
      this.values = new Map();   // id -> {v, x, u, q, t, srv, recv, s}
      this.history = new Map();  // id -> [[serverMs, v], ...] (last minute)
      this.warnings = new Map(); // rule -> warning event
      this.events = [];
      this.run = "";
      this.lastSummary = null;
      this.lastMsg = -Infinity;  // performance.now() of the last message
      this.lastServer = 0;       // daemon time of the last message
      this.listeners = [];
      this.open = false;
    }

    start() {
      const es = new EventSource(streamURL(this.url));
      this.es = es;
      if (!this.registered) { this.registered = true; restarts.push(() => { this.es.close(); this.start(); }); }
      const on = (name, f) => es.addEventListener(name, (m) => {
        let d;
        try { d = JSON.parse(m.data); } catch (e) { return; }
        this.lastMsg = performance.now();
        if (d.t) this.lastServer = d.t;
        f(d);
        this.changed(name, d);
      });
      es.onopen = () => { this.open = true; this.changed("open"); };
      es.onerror = () => {
        this.open = es.readyState === EventSource.OPEN;
        // A refused reconnection (the daemon stopping, a proxy's error page)
        // closes an EventSource for good: start a new one in a moment.
        if (es.readyState === EventSource.CLOSED && es === this.es && !this.retrying) {
          this.retrying = true;
          setTimeout(() => { this.retrying = false; this.start(); }, 2000);
        }
        this.changed("error");
      };
      on("snapshot", (d) => this.onSnapshot(d));
      on("values", (d) => { for (const v of d.v) this.setValue(v, d.t); });
      on("stale", (d) => { for (const id of d.c) { const v = this.values.get(id); if (v) v.s = true; } });
      on("heartbeat", () => {});
      on("warning", (e) => this.onWarning(e));
      on("event", (e) => this.onEvent(e));
      return this;
    }

    onSnapshot(d) {
      this.snap = d;
      this.channels = d.channels;
      this.byName = new Map(d.channels.map((c) => [c.name, c]));
      this.values = new Map();
      for (const v of d.values) this.setValue(v, d.t);
      this.warnings = new Map(d.warnings.map((w) => [w.name, w]));
      this.events = d.events.slice();
      this.run = d.run || "";
      for (const e of this.events) if (e.kind === "run_ended") this.lastSummary = e;
    }

    setValue(v, serverMs) {
      v.srv = serverMs;
      v.recv = performance.now();
      this.values.set(v.c, v);
      if (v.v !== null) {
        let h = this.history.get(v.c);
        if (!h) { h = []; this.history.set(v.c, h); }
        h.push([serverMs, v.v]);
        while (h.length && h[0][0] < serverMs - 60000) h.shift();
      }
    }

    onWarning(e) {
      if (e.kind === "warning_raised") this.warnings.set(e.name, e);
      else if (e.kind === "warning_acknowledged") {
        const w = this.warnings.get(e.name);
        if (w) w.acked = true;
      } else if (e.kind === "warning_cleared") this.warnings.delete(e.name);
    }

    onEvent(e) {
      this.events.push(e);
      if (this.events.length > 20) this.events.shift();
      if (e.kind === "run_started") this.run = e.name;
      if (e.kind === "run_ended") { if (this.run === e.name) this.run = ""; this.lastSummary = e; }
    }

    // lost: no message for longer than the daemon's promise (2 s), or the
    // connection is down.
    lost() {
      const after = this.snap ? this.snap.lost_after_ms : 2000;
      return !this.snap || performance.now() - this.lastMsg > after;
    }

    // silentFor: seconds since the last message, for the words on screen.
    silentFor() {
      return this.lastMsg === -Infinity ? null : (performance.now() - this.lastMsg) / 1000;
    }

    // value returns the channel's latest value with its state: "live",
    // "stale" (older than the channel's maximum age, or flagged), "bad"
    // (a quality other than ok), "lost" (the stream is quiet) or "none".
    value(name) {
      const ch = this.byName.get(name);
      if (!ch) return { state: "absent" };
      const v = this.values.get(ch.id);
      if (!v) return { state: "none", ch };
      const age = (v.srv - v.t) + (performance.now() - v.recv);
      let state = "live";
      if (this.lost()) state = "lost";
      else if (v.q !== "ok" && v.q !== "stale") state = "bad";
      else if (v.s || v.q === "stale" || age > ch.max_age_ms) state = "stale";
      return { state, ch, v, age };
    }

    changed(kind, d) { for (const f of this.listeners) f(kind, d); }
    onChange(f) { this.listeners.push(f); }
  }

  // Control commands: POST with the typed token in the Authorization header.
  function token() { return sessionStorage.getItem(TOKEN_KEY) || ""; }
  function setToken(t) {
    if (t) sessionStorage.setItem(TOKEN_KEY, t); else sessionStorage.removeItem(TOKEN_KEY);
  }
  async function control(path, fields) {
    const t = token();
    if (!t) return { ok: false, text: "read-only: enter the control token first" };
    const body = new URLSearchParams(fields || {});
    try {
      const r = await fetch(path, { method: "POST", headers: { Authorization: "Bearer " + t }, body });
      const text = (await r.text()).trim();
      return { ok: r.ok, status: r.status, text: r.ok ? text : r.status + ": " + text };
    } catch (e) {
      return { ok: false, text: "not sent: " + e.message };
    }
  }

  // Keep the screen awake where the browser allows it.
  async function keepAwake() {
    if (!("wakeLock" in navigator)) return;
    const get = async () => {
      try { await navigator.wakeLock.request("screen"); } catch (e) { /* not allowed now */ }
    };
    document.addEventListener("visibilitychange", () => { if (document.visibilityState === "visible") get(); });
    get();
  }

  // Words and shapes for severities: never colour alone.
  const severities = {
    critical: { word: "ALERT", shape: "◆" },
    warning: { word: "CAUTION", shape: "▲" },
    info: { word: "NOTE", shape: "●" },
  };
  function severity(s) { return severities[s] || { word: (s || "warning").toUpperCase(), shape: "▲" }; }

  function pretty(name) {
    const s = (name || "").replace(/_/g, " ");
    return s.charAt(0).toUpperCase() + s.slice(1);
  }

  function el(tag, attrs, ...kids) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "class") e.className = v;
      else if (k.startsWith("on")) e.addEventListener(k.slice(2), v);
      else e.setAttribute(k, v);
    }
    for (const k of kids) if (k !== null && k !== undefined) e.append(k);
    return e;
  }

  function ago(s) {
    if (s === null || s === undefined || !isFinite(s)) return "never";
    if (s < 60) return Math.round(s) + " s";
    if (s < 3600) return Math.round(s / 60) + " min";
    return Math.round(s / 3600) + " h";
  }

  // The connection badge: text and a shape, updated by the caller.
  function connection(live) {
    if (!live.snap) return { cls: "conn-wait", text: "◌ Connecting…" };
    if (live.lost()) return { cls: "conn-lost", text: "✕ Connection lost " + ago(live.silentFor()) + " ago — nothing below is live" };
    return { cls: "conn-live", text: "● Connected" };
  }

  // The token box: read-only until the user types the control token.
  function tokenBox(host, onChange) {
    const input = el("input", { type: "password", autocomplete: "off", placeholder: "control token", "aria-label": "control token" });
    const state = el("span", { class: "token-state" });
    const show = () => {
      state.textContent = token() ? "controls unlocked" : "read-only";
      if (onChange) onChange();
    };
    const set = el("button", { type: "button", onclick: () => { setToken(input.value.trim()); input.value = ""; show(); } }, "Use");
    const clear = el("button", { type: "button", onclick: () => { setToken(""); show(); } }, "Lock");
    host.append(el("div", { class: "token" }, state, input, set, clear));
    show();
  }

  function fieldsText(e) {
    const parts = [];
    if (e.text) {
      // The server's words and display units for the fields.
      for (const [k, v] of Object.entries(e.text)) parts.push(k + " " + v);
    } else {
      for (const [k, v] of Object.entries(e.fields || {})) {
        if (k === "active") continue;
        parts.push(pretty(k).toLowerCase() + " " + (Math.abs(v) >= 1000 || Number.isInteger(v) ? Math.round(v) : v.toPrecision(4)));
      }
    }
    for (const [k, v] of Object.entries(e.tags || {})) {
      if (k === "severity") continue;
      parts.push(pretty(k).toLowerCase() + " " + v);
    }
    return parts.join(" · ");
  }

  // The browser's unit choices (the compact form, "pressure=bar,
  // power=hp_mech"), kept in localStorage and sent on every stream's URL.
  const UNITS_KEY = "plenum.units";
  const restarts = []; // reconnect each stream, with the new units
  function onUnits(f) { restarts.push(f); }
  function units() { return localStorage.getItem(UNITS_KEY) || ""; }
  function streamURL(path) {
    const u = units();
    return u ? path + "?units=" + encodeURIComponent(u) : path;
  }

  // The units panel under the page's header: one choice per quantity, the
  // configured unit first. A change is kept, and every stream reconnects
  // with it (a new snapshot in the new units).
  // A stored choice the daemon refuses is dropped, and the panel says why.
  async function unitsPanel() {
    const bar = document.querySelector("header.bar");
    if (!bar) return;
    const stored = units();
    const picked = new Map(stored ? stored.split(",").map((i) => i.split("=")) : []);
    const summary = el("summary", {}, "Units" + (stored ? ": " + stored.replaceAll(",", ", ") : ": as configured"));
    const box = el("details", { id: "units", class: "units" }, summary);
    bar.after(box);
    let r;
    try {
      r = await fetch("/console/units" + (stored ? "?units=" + encodeURIComponent(stored) : ""));
    } catch (e) { return; }
    if (r.status === 400) {
      const why = (await r.text()).trim();
      localStorage.removeItem(UNITS_KEY);
      summary.textContent = "Units: as configured";
      box.append(el("p", { class: "unote" }, "Your saved unit choice was refused and dropped (" + why + ")."));
      return unitsFill(box, summary, new Map());
    }
    if (!r.ok) return;
    unitsFill(box, summary, picked, (await r.json()).items);
  }
  async function unitsFill(box, summary, picked, items) {
    if (!items) {
      const r = await fetch("/console/units");
      if (!r.ok) return;
      items = (await r.json()).items;
    }
    const form = el("div", { class: "unitgrid" });
    for (const it of items) {
      const sel = el("select", { name: it.key, "aria-label": pretty(it.key) + " unit" }, el("option", { value: "" }, "as configured"));
      for (const c of it.choices) sel.append(el("option", { value: c }, c));
      sel.value = picked.get(it.key) || "";
      sel.addEventListener("change", () => {
        const parts = [];
        for (const s of form.querySelectorAll("select")) if (s.value) parts.push(s.name + "=" + s.value);
        if (parts.length) localStorage.setItem(UNITS_KEY, parts.join(",")); else localStorage.removeItem(UNITS_KEY);
        summary.textContent = "Units" + (parts.length ? ": " + parts.join(", ") : ": as configured");
        for (const f of restarts) f();
      });
      form.append(el("label", {}, pretty(it.key), sel));
    }
    box.append(form);
  }
  document.addEventListener("DOMContentLoaded", unitsPanel);

  return { Live, streamURL, units, onUnits, control, token, keepAwake, severity, pretty, el, ago, connection, tokenBox, fieldsText };
})();
