// demur review desk: claim a case, show it with the model's view, record the person's decision.
// Plain script, no framework. Text is always set with textContent (never as HTML).
"use strict";

(function () {
  const TOKEN_KEY = "demur.review.token";
  const POLL_MS = 5000;
  const $ = (id) => document.getElementById(id);

  let current = null;      // the claimed item
  let skipped = [];        // ids given back this session, not offered again
  let busy = false;
  let pollTimer = null;

  function token() { return sessionStorage.getItem(TOKEN_KEY); }

  function say(text, isError) {
    const el = $("status");
    el.textContent = text || "";
    el.classList.toggle("error", !!isError);
  }

  async function api(method, path, body) {
    const headers = { "Authorization": "Bearer " + token(), "Accept": "application/json" };
    const init = { method: method, headers: headers, cache: "no-store", credentials: "omit" };
    if (body !== undefined) {
      headers["Content-Type"] = "application/json";
      init.body = JSON.stringify(body);
    }
    const response = await fetch(path, init);
    let payload = null;
    try { payload = await response.json(); } catch (e) { payload = null; }
    if (response.status === 401) {
      signOut("The token was not accepted. Paste it again.");
      throw new Error("unauthorised");
    }
    if (!response.ok) {
      const msg = payload && payload.error ? payload.error.message : ("HTTP " + response.status);
      throw new Error(msg);
    }
    return payload;
  }

  function showCounts(counts) {
    if (!counts) return;
    $("waiting").textContent = "waiting: " + counts.pending + " · in review: " + counts.claimed +
      " · decided: " + counts.decided;
  }

  function signOut(message) {
    sessionStorage.removeItem(TOKEN_KEY);
    current = null;
    if (pollTimer) { clearTimeout(pollTimer); pollTimer = null; }
    $("desk").hidden = true;
    $("empty").hidden = true;
    $("signout").hidden = true;
    $("whoami").textContent = "";
    $("signin").hidden = false;
    $("signin-error").textContent = message || "";
  }

  async function start() {
    $("signin").hidden = true;
    $("signout").hidden = false;
    try {
      const summary = await api("GET", "/v1/reviews/summary");
      $("whoami").textContent = "you: " + summary.reviewer + (summary.admin ? " (admin)" : "");
      showCounts(summary.counts);
    } catch (e) {
      if (e.message !== "unauthorised") say("Could not reach the review queue: " + e.message, true);
      if (!token()) return;
    }
    await next();
  }

  async function next() {
    if (pollTimer) { clearTimeout(pollTimer); pollTimer = null; }
    busy = true;
    try {
      const out = await api("POST", "/v1/reviews/claim", { skip: skipped.slice(-100) });
      showCounts(out.counts);
      if (!out.item) {
        current = null;
        $("desk").hidden = true;
        $("empty").hidden = false;
        if (skipped.length && out.counts && out.counts.pending > 0) {
          say("Only cases you skipped are waiting; they come back after a reload.");
        }
        pollTimer = setTimeout(next, POLL_MS);
        return;
      }
      render(out.item);
    } catch (e) {
      if (e.message !== "unauthorised") {
        say("Could not claim a case: " + e.message, true);
        pollTimer = setTimeout(next, POLL_MS);
      }
    } finally {
      busy = false;
    }
  }

  function fmt(x, digits) {
    return (typeof x === "number" && isFinite(x)) ? x.toFixed(digits === undefined ? 3 : digits) : "–";
  }

  function render(item) {
    current = item;
    $("empty").hidden = true;
    $("desk").hidden = false;
    const c = item.case || {};
    const s = item.summary || {};
    $("item-id").textContent = item.id;
    $("item-kind").textContent = item.kind === "audit" ? "audit (the model accepted this one)" : "abstained";
    $("item-client").textContent = item.client_case_id || "–";
    $("item-model").textContent = item.model.name + " " + item.model.version;
    $("item-deadline").textContent = item.claim ? new Date(item.claim.deadline).toLocaleTimeString() : "–";
    $("case-kind").textContent = c.kind ? "(" + c.kind + ")" : "";
    renderCase(c);
    renderView(s, item);
    renderControls(s);
    $("note").value = "";
    say("");
  }

  function renderCase(c) {
    const canvas = $("digit");
    const table = $("features");
    const values = c.values || [];
    const shape = c.shape || [values.length];
    if (c.kind === "image") {
      table.hidden = true;
      canvas.hidden = false;
      const grid = c.grid || (shape.length > 1 ? shape.slice(-2) : [1, shape[0]]);
      const h = grid[0];
      const w = grid[1];
      const low = (c.low && c.low.length) ? c.low[0] : Math.min.apply(null, values);
      const high = (c.high && c.high.length) ? c.high[0] : Math.max.apply(null, values);
      const ctx = canvas.getContext("2d");
      const cell = Math.floor(Math.min(canvas.width / w, canvas.height / h));
      ctx.fillStyle = "#f3efe6";
      ctx.fillRect(0, 0, canvas.width, canvas.height);
      for (let r = 0; r < h; r++) {
        for (let q = 0; q < w; q++) {
          const v = values[r * w + q];
          const t = high > low ? Math.max(0, Math.min(1, (v - low) / (high - low))) : 0;
          const ink = Math.round(243 - t * (243 - 30));  // paper to ink
          ctx.fillStyle = "rgb(" + ink + "," + Math.round(ink * 0.98) + "," + Math.round(ink * 0.95) + ")";
          ctx.fillRect(q * cell, r * cell, cell, cell);
        }
      }
    } else {
      canvas.hidden = true;
      table.hidden = false;
      const body = table.tBodies[0];
      while (body.firstChild) body.removeChild(body.firstChild);
      values.forEach(function (v, i) {
        const tr = document.createElement("tr");
        const name = document.createElement("td");
        name.textContent = (c.names && c.names[i]) || ("x" + i);
        const val = document.createElement("td");
        val.textContent = fmt(v, 4);
        const range = document.createElement("td");
        const lo = c.low ? c.low[i] : undefined;
        const hi = c.high ? c.high[i] : undefined;
        range.textContent = (lo === undefined) ? "–" : ("[" + fmt(lo, 4) + ", " + fmt(hi, 4) + "]");
        if (lo !== undefined && (v < lo || v > hi)) { val.classList.add("outside"); val.title = "outside the training range"; }
        tr.append(name, val, range);
        body.appendChild(tr);
      });
    }
  }

  function renderView(s, item) {
    const u = s.uncertainty || {};
    const probs = $("probs");
    while (probs.firstChild) probs.removeChild(probs.firstChild);
    const iv = s.interval || {};
    if (s.task === "classification" && Array.isArray(s.mean)) {
      $("interval").hidden = true;
      const labels = s.labels || s.mean.map(function (_, i) { return String(i); });
      let top = 0;
      s.mean.forEach(function (p, i) { if (p > s.mean[top]) top = i; });
      $("model-guess").textContent = "Model's guess: " + labels[top] + " (mean probability " + fmt(s.mean[top], 2) + ")";
      s.mean.forEach(function (p, i) {
        const li = document.createElement("li");
        if (i === top) li.classList.add("top");
        const name = document.createElement("span");
        name.textContent = labels[i];
        const bar = document.createElement("span");
        bar.className = "bar";
        const fill = document.createElement("span");
        fill.className = "fill";
        fill.style.width = (100 * p).toFixed(1) + "%";
        bar.appendChild(fill);
        if (Array.isArray(iv.lower) && Array.isArray(iv.upper)) {
          const spread = document.createElement("span");
          spread.className = "spread";
          spread.style.left = (100 * iv.lower[i]).toFixed(1) + "%";
          spread.style.width = Math.max(0.5, 100 * (iv.upper[i] - iv.lower[i])).toFixed(1) + "%";
          spread.title = (100 * (iv.level || 0.9)).toFixed(0) + "% of draws between " + fmt(iv.lower[i], 2) + " and " + fmt(iv.upper[i], 2);
          bar.appendChild(spread);
        }
        const num = document.createElement("span");
        num.className = "num";
        num.textContent = fmt(p, 2);
        li.append(name, bar, num);
        probs.appendChild(li);
      });
    } else {
      $("model-guess").textContent = "Model's estimate: " + fmt(s.mean, 4);
      $("interval").hidden = false;
      $("interval").textContent = (100 * (iv.level || 0.9)).toFixed(0) + "% interval: [" + fmt(iv.lower, 4) + ", " + fmt(iv.upper, 4) + "]";
    }
    $("mi").textContent = fmt(u.mutual_information, 4) + " " + (u.unit || "nats");
    $("pe").textContent = fmt(u.predictive_entropy, 4) + " " + (u.unit || "nats");
    $("score").textContent = s.score ? (s.score.name + " " + fmt(s.score.value, 4) + " (threshold " + fmt(s.threshold, 4) + ")") : "–";
    $("reason").textContent = item.kind === "audit" ? "a random audit of accepted answers" : (s.reason || "the model abstained");
  }

  function renderControls(s) {
    const box = $("label-buttons");
    while (box.firstChild) box.removeChild(box.firstChild);
    const classification = s.task !== "regression";
    $("value-form").hidden = classification;
    box.hidden = !classification;
    if (classification) {
      const labels = s.labels || (Array.isArray(s.mean) ? s.mean.map(function (_, i) { return String(i); }) : []);
      labels.forEach(function (label, i) {
        const b = document.createElement("button");
        b.type = "button";
        b.className = "label-button";
        b.dataset.label = label;
        b.textContent = label;
        if (i < 10) {
          const k = document.createElement("kbd");
          k.textContent = String(i);
          b.appendChild(k);
        }
        b.addEventListener("click", function () { decide({ label: label }); });
        box.appendChild(b);
      });
    } else {
      $("value").value = "";
      $("value").focus();
    }
  }

  async function decide(decision) {
    if (!current || busy) return;
    busy = true;
    const note = $("note").value.trim();
    if (note) decision.note = note;
    const id = current.id;
    try {
      const out = await api("POST", "/v1/reviews/" + encodeURIComponent(id) + "/decision", decision);
      showCounts(out.counts);
      say("Recorded " + (decision.label !== undefined ? "label " + decision.label : "value " + decision.value) + " for " + id + ".");
      busy = false;
      await next();
    } catch (e) {
      busy = false;
      if (e.message !== "unauthorised") say("Not recorded: " + e.message, true);
    }
  }

  async function skip() {
    if (!current || busy) return;
    busy = true;
    const id = current.id;
    try {
      await api("POST", "/v1/reviews/" + encodeURIComponent(id) + "/release");
      skipped.push(id);
      say("Gave back " + id + ".");
    } catch (e) {
      if (e.message !== "unauthorised") say("Could not give the case back: " + e.message, true);
    }
    busy = false;
    await next();
  }

  function onKey(event) {
    if (!current || event.ctrlKey || event.metaKey || event.altKey) return;
    const target = event.target;
    const typing = target && (target.tagName === "INPUT" || target.tagName === "TEXTAREA");
    if (typing) return;  // digits typed into the note or value box are text, not decisions
    const s = current.summary || {};
    if (/^[0-9]$/.test(event.key) && s.task !== "regression") {
      const labels = s.labels || [];
      const label = labels[Number(event.key)];
      if (label !== undefined) { event.preventDefault(); decide({ label: label }); }
    } else if (event.key === "s" || event.key === "S") {
      event.preventDefault();
      skip();
    }
  }

  document.addEventListener("DOMContentLoaded", function () {
    $("token-form").addEventListener("submit", function (event) {
      event.preventDefault();
      const value = $("token").value.trim();
      if (!value) return;
      sessionStorage.setItem(TOKEN_KEY, value);
      $("token").value = "";
      start();
    });
    $("signout").addEventListener("click", function () { signOut(""); });
    $("skip").addEventListener("click", skip);
    $("value-form").addEventListener("submit", function (event) {
      event.preventDefault();
      const v = Number($("value").value);
      if ($("value").value === "" || !isFinite(v)) { say("Type a number first.", true); return; }
      decide({ value: v });
    });
    document.addEventListener("keydown", onKey);
    if (token()) start(); else signOut("");
  });
})();
