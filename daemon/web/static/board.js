// Hourwatch ward board: live updates by server-sent events, and acknowledgement.
// Hand-written, no library: it only swaps in cards the server has rendered, says
// plainly when updates stop, and posts acknowledgements with the session's token.
"use strict";
(function () {
  const HEARTBEAT_S = 5;            // the server sends its state at least this often
  const SILENT_AFTER_S = 3 * HEARTBEAT_S;
  const body = document.body;
  const banner = document.getElementById("banner");
  const board = document.getElementById("board");
  const csrf = (document.querySelector('meta[name="csrf"]') || {}).content || "";
  let lastHeard = Date.now();
  let problem = null;               // what the banner says, "" when all is well

  function fillTokens(root) {
    root.querySelectorAll('form input[name="csrf"]').forEach(function (i) {
      if (!i.value) { i.value = csrf; }
    });
  }

  function say(text) {
    if (text === problem) { return; }
    problem = text;
    if (text) {
      banner.textContent = text;
      banner.hidden = false;
      body.classList.add("stale");
    } else {
      banner.hidden = true;
      banner.textContent = "";
      body.classList.remove("stale");
    }
    const state = document.getElementById("live-state");
    if (state) { state.textContent = text ? "not live" : "live"; }
  }

  function replaceCard(bed, html) {
    const old = document.getElementById("bed-" + bed);
    const tmp = document.createElement("div");
    tmp.innerHTML = html;
    const fresh = tmp.firstElementChild;
    if (!fresh) { return; }
    fillTokens(fresh);
    if (!old) {
      if (board && !board.dataset.only) { board.appendChild(fresh); }
      return;
    }
    // keep the keyboard where it was: the same control in the new card
    const active = document.activeElement;
    const key = active && old.contains(active) ? active.getAttribute("data-focus") : null;
    old.replaceWith(fresh);
    if (key) {
      const again = fresh.querySelector('[data-focus="' + CSS.escape(key) + '"]');
      (again || fresh.querySelector("h2 a")).focus();
    }
  }

  // Moving a node takes the keyboard focus out of it, so cards are moved only when the
  // ward's order really changed, and the focus is put back where it was.
  function order(beds) {
    if (!board || board.dataset.only) { return; }
    const keep = new Set(beds.map(function (b) { return "bed-" + b; }));
    Array.from(board.children).forEach(function (el) {
      if (!keep.has(el.id)) { el.remove(); }
    });
    const wanted = beds.map(function (b) { return document.getElementById("bed-" + b); })
      .filter(function (el) { return el; });
    const now = Array.from(board.children);
    if (wanted.length === now.length && wanted.every(function (el, i) { return el === now[i]; })) {
      return;
    }
    const active = document.activeElement;
    wanted.forEach(function (el) { board.appendChild(el); });
    if (active && active !== document.activeElement && board.contains(active)) {
      active.focus();
    }
  }

  function listen() {
    if (!board || !board.dataset.events || !window.EventSource) { return; }
    const only = board.dataset.only || "";
    const source = new EventSource(board.dataset.events);
    source.addEventListener("open", function () { lastHeard = Date.now(); });
    source.addEventListener("error", function () {
      say("Live updates lost: the connection to Hourwatch is down. The figures below may be " +
          "out of date. Trying again…");
    });
    source.addEventListener("ward", function (e) {
      lastHeard = Date.now();
      const d = JSON.parse(e.data);
      const summary = document.getElementById("summary");
      if (summary && !only) { summary.innerHTML = d.summary; }
      order(d.beds);
    });
    source.addEventListener("card", function (e) {
      lastHeard = Date.now();
      const d = JSON.parse(e.data);
      if (!only || only === d.bed) { replaceCard(d.bed, d.html); }
    });
    source.addEventListener("status", function (e) {
      lastHeard = Date.now();
      const d = JSON.parse(e.data);
      const asOf = document.getElementById("as-of");
      if (asOf && d.time) { asOf.textContent = d.time; }
      say(d.state === "ok" ? "" : d.text);
    });
    setInterval(function () {
      const silent = (Date.now() - lastHeard) / 1000;
      if (silent > SILENT_AFTER_S) {
        say("No word from Hourwatch for " + Math.round(silent) + " s: the figures below may " +
            "be out of date.");
      }
    }, 1000);
  }

  // acknowledgement: post with the session's token; the card then updates by itself
  document.addEventListener("submit", function (e) {
    const form = e.target;
    if (!form.classList || !form.classList.contains("ack") || !window.fetch) { return; }
    e.preventDefault();
    const result = document.getElementById("ack-result");
    const button = form.querySelector("button");
    if (button) { button.disabled = true; }
    fetch(form.action, {
      method: "POST",
      headers: {"X-CSRF-Token": csrf, "Accept": "application/json",
                "Content-Type": "application/x-www-form-urlencoded"},
      body: "csrf=" + encodeURIComponent(csrf),
      credentials: "same-origin",
    }).then(function (r) {
      return r.json().catch(function () { return {text: "HTTP " + r.status}; });
    }).then(function (d) {
      if (result) { result.textContent = d.text || ""; }
      if (d.login && d.login_url) { window.location.href = d.login_url; }
    }).catch(function () {
      if (result) { result.textContent = "Not sent: the connection to Hourwatch is down."; }
    }).finally(function () {
      if (button) { button.disabled = false; }
    });
  });

  fillTokens(document);
  listen();
})();
