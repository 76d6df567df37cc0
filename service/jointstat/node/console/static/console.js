// The console's live updates: pages showing a running session ask the node for its progress every few hundred
// milliseconds (fetch, same origin, the session cookie) and write the answers into the page with textContent
// only. No other script runs on the console; nothing is loaded from anywhere else.
"use strict";

(function () {
  const pollMs = Number(document.body.dataset.pollMs) || 1000;
  const DASH = "\u2014";

  function count(n) {
    return n === null || n === undefined ? DASH : Number(n).toLocaleString("en-US");
  }

  function size(n) {
    if (n === null || n === undefined) return DASH;
    let value = Number(n);
    const units = ["B", "KiB", "MiB", "GiB"];
    for (let i = 0; i < units.length; i++) {
      if (value < 1024 || i === units.length - 1) {
        return i === 0 ? value.toFixed(0) + " B" : value.toFixed(1) + " " + units[i];
      }
      value /= 1024;
    }
    return DASH;
  }

  function duration(s) {
    if (s === null || s === undefined) return DASH;
    if (s < 1) return s.toFixed(3) + " s";
    if (s < 60) return s.toFixed(1) + " s";
    const whole = Math.round(s);
    if (whole < 3600) return Math.floor(whole / 60) + " min " + (whole % 60) + " s";
    const minutes = Math.floor((whole % 3600) / 60);
    return Math.floor(whole / 3600) + " h " + String(minutes).padStart(2, "0") + " min";
  }

  function rate(r) {
    return r === null || r === undefined ? DASH : Math.round(r).toLocaleString("en-US") + " AND gates/s";
  }

  function percent(done, total) {
    return total ? Math.round((100 * done) / total) + "%" : DASH;
  }

  function phaseName(p) {
    return p ? p.replace(/_/g, " ") : DASH;
  }

  function setText(root, field, text) {
    root.querySelectorAll('[data-field="' + field + '"]').forEach(function (el) {
      el.textContent = text;
    });
  }

  function fill(root, p) {
    root.querySelectorAll('[data-field="status"]').forEach(function (el) {
      el.textContent = p.status;
      el.className = "pill " + p.status;
    });
    setText(root, "phase", p.ended ? "" : phaseName(p.phase));
    const total = p.and_gates_total;
    root.querySelectorAll('[data-field="bar"]').forEach(function (bar) {
      bar.max = total || 1;
      bar.value = total ? p.and_gates_done : 0;
    });
    setText(root, "done", count(p.and_gates_done));
    setText(root, "total", count(total));
    setText(root, "percent", percent(p.and_gates_done, total));
    setText(root, "sent", size(p.bytes_sent));
    setText(root, "received", size(p.bytes_received));
    setText(root, "rate", rate(p.and_gates_per_s));
    setText(root, "left", p.ended ? DASH : duration(p.seconds_left));
    setText(root, "elapsed", duration(p.elapsed_s));
    root.querySelectorAll('[data-field="phase-label"]').forEach(function (el) {
      el.hidden = p.ended;
    });
    root.querySelectorAll('[data-field="reason"]').forEach(function (el) {
      el.textContent = p.reason || "";
      el.hidden = !p.reason;
    });
    root.querySelectorAll('[data-field="result-link"]').forEach(function (el) {
      el.hidden = !(p.status === "completed" && p.has_result);
    });
    if (p.peer) setText(root, "peer", p.peer);
    root.querySelectorAll('[data-field="stored-note"]').forEach(function (el) {
      el.hidden = p.live;
    });
    if (p.ended) root.classList.add("ended");
  }

  function cell(tag, text, className) {
    const el = document.createElement(tag);
    el.textContent = text;
    if (className) el.className = className;
    return el;
  }

  function fillPhases(root, phases) {
    const body = root.querySelector('[data-rows="phases"]');
    if (!body || body.rows.length === phases.length) return;
    const rows = phases.map(function (ph) {
      const tr = document.createElement("tr");
      const th = cell("th", phaseName(ph.name));
      th.scope = "row";
      tr.append(th, cell("td", duration(ph.duration_s)), cell("td", size(ph.bytes_sent)), cell("td", size(ph.bytes_received)));
      return tr;
    });
    body.replaceChildren.apply(body, rows);
    const empty = root.querySelector('[data-empty="phases"]');
    if (empty) empty.hidden = phases.length > 0;
  }

  function loggedOut() {
    if (document.querySelector('[data-notice="logged-out"]')) return;
    const note = cell("p", "You are no longer logged in; reload the page to log in again.", "notice bad");
    note.dataset.notice = "logged-out";
    note.setAttribute("role", "alert");
    document.querySelector("main").prepend(note);
  }

  // Ask ``url`` every pollMs; ``handle`` returns false to stop, or a number of milliseconds to wait instead.
  // Errors back off and retry.
  function poll(url, handle) {
    function next(delay) {
      window.setTimeout(run, delay);
    }
    function run() {
      fetch(url, { credentials: "same-origin", cache: "no-store", headers: { Accept: "application/json" } })
        .then(function (response) {
          if (response.status === 401) {
            loggedOut();
            return null;
          }
          if (!response.ok) throw new Error("HTTP " + response.status);
          return response.json();
        })
        .then(function (data) {
          if (data === null) return;
          const wait = handle(data);
          if (wait !== false) next(typeof wait === "number" ? wait : pollMs);
        })
        .catch(function () {
          next(pollMs * 4);
        });
    }
    next(pollMs);
  }

  // One session's page.
  const article = document.querySelector("[data-progress]");
  if (article && article.dataset.ended !== "yes") {
    let after = 0;
    poll(article.dataset.progress, function (p) {
      fill(article, p);
      fillPhases(article, p.phases);
      if (!p.ended) return true;
      after += 1; // a completed session's result file is written just after it ends
      return p.status === "completed" && !p.has_result && after < 20;
    });
  }

  // The list of sessions: running ones update in place, new ones appear, ended ones say how they ended.
  const live = document.querySelector("[data-live]");
  if (live) {
    const body = live.querySelector('[data-rows="running"]');
    const template = live.querySelector('template[data-template="running-row"]');
    const empty = live.querySelector('[data-empty="running"]');
    const table = live.querySelector('[data-table="running"]');
    poll(live.dataset.live, function (data) {
      data.sessions.forEach(function (s) {
        let row = null;
        body.querySelectorAll("tr[data-session]").forEach(function (tr) {
          if (tr.dataset.session === s.session) row = tr;
        });
        if (row === null) {
          if (s.ended || !template) return;
          row = template.content.firstElementChild.cloneNode(true);
          row.dataset.session = s.session;
          const link = row.querySelector("a");
          link.href = "/sessions/" + encodeURIComponent(s.session);
          link.querySelector("code").textContent = s.session.slice(0, 12);
          setText(row, "job", s.job);
          setText(row, "role", s.role || DASH);
          setText(row, "peer", s.peer || DASH);
          body.prepend(row);
        }
        fill(row, s);
      });
      const any = body.rows.length > 0;
      if (empty) empty.hidden = any;
      if (table) table.hidden = !any;
      const moving = data.sessions.some(function (s) {
        return !s.ended;
      });
      return moving ? pollMs : pollMs * 4; // look less often while nothing runs
    });
  }
})();
