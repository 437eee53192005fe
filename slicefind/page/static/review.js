// slicefind review page: walks the queue candidate by candidate and writes every change
// to the workspace through the local API at once (no save button). Plain DOM, no library.
"use strict";

(() => {
  const app = {
    state: null,            // the last api/state answer
    rows: new Map(),        // row -> queued example
    strata: [],             // strata with queued rows, in review order
    members: new Map(),     // stratum -> its queued rows in sample order
    s: 0,                   // current stratum (index into strata)
    i: 0,                   // current example (index into the stratum's rows)
    version: null,
    pending: 0,
    chain: Promise.resolve(),
    timers: new Map(),      // debounced text saves: key -> {timer, path, body}
    unsaved: new Set(),     // rows whose last change the server could not write (busy workspace)
    tallyDue: false,        // a write landed since the tally was last read
    tallyTimer: null,
    tallyReading: 0,
    tallyTicket: 0,         // only the latest tally read is drawn
  };

  // ---- small helpers ------------------------------------------------------------------

  const $ = (selector) => document.querySelector(selector);

  function el(tag, props = {}, ...children) {
    const node = document.createElement(tag);
    for (const [key, value] of Object.entries(props)) {
      if (value === undefined || value === null || value === false) continue;
      if (key === "class") node.className = value;
      else if (key === "text") node.textContent = value;
      else if (key === "data") Object.entries(value).forEach(([k, v]) => { node.dataset[k] = v; });
      else if (key.startsWith("on")) node.addEventListener(key.slice(2), value);
      else if (value === true) node.setAttribute(key, "");
      else node.setAttribute(key, value);
    }
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function fill(node, ...children) {
    node.replaceChildren(...children.flat().filter((c) => c !== null && c !== undefined && c !== false));
  }

  const pct = (x, digits = 1) => (x === null || x === undefined ? "–" : `${(x * 100).toFixed(digits)}%`);
  const raw = (x) => (x === null || x === undefined ? "" : String(x));
  const show = (x) => (x === null || x === undefined || x === "" ? "—" : String(x));
  const verdictOf = (sid) => (app.state.tally.slices.find((s) => s.slice_id === sid) || null);

  // A sticky message stays until the next one replaces it.
  function say(message, isError = false, sticky = false) {
    const box = $("#status");
    box.textContent = message;
    box.className = `status visible${isError ? " error" : ""}`;
    clearTimeout(say.timer);
    if (!sticky) say.timer = setTimeout(() => { box.className = "status"; }, isError ? 9000 : 2200);
  }

  function markPending() {
    document.body.dataset.pending = String(app.pending + app.timers.size
      + (app.tallyDue ? 1 : 0) + app.tallyReading);
  }

  // ---- the current example ------------------------------------------------------------

  const stratum = () => app.strata[app.s];
  const stratumRows = () => app.members.get(stratum().stratum) || [];
  const currentRow = () => stratumRows()[app.i];

  function firstOpen(rows) {
    const k = rows.findIndex((r) => !app.rows.get(r).reviewed);
    return k < 0 ? 0 : k;
  }

  function remember() {
    const hash = `#${encodeURIComponent(stratum().stratum)}:${app.i + 1}`;
    if (location.hash !== hash) history.replaceState(null, "", hash);
  }

  function restorePosition(previousRow) {
    if (previousRow !== undefined && app.rows.has(previousRow)) {
      const item = app.rows.get(previousRow);
      app.s = Math.max(0, app.strata.findIndex((s) => s.stratum === item.stratum));
      app.i = Math.max(0, stratumRows().indexOf(previousRow));
      return;
    }
    const match = /^#([^:]+):(\d+)$/.exec(location.hash);
    if (match) {
      const s = app.strata.findIndex((x) => x.stratum === decodeURIComponent(match[1]));
      if (s >= 0) {
        app.s = s;
        app.i = Math.min(Math.max(0, Number(match[2]) - 1), stratumRows().length - 1);
        return;
      }
    }
    const open = app.strata.findIndex((s) => (app.members.get(s.stratum) || [])
      .some((r) => !app.rows.get(r).reviewed));
    app.s = open < 0 ? 0 : open;
    app.i = firstOpen(stratumRows());
  }

  // ---- reading state ------------------------------------------------------------------

  function ingest(state) {
    app.tallyTicket += 1;   // a tally read already under way is older than this state
    app.state = state;
    app.version = state.version;
    app.rows = new Map(state.rows.map((r) => [r.row, r]));
    app.members = new Map();
    for (const r of state.rows) {
      if (!app.members.has(r.stratum)) app.members.set(r.stratum, []);
      app.members.get(r.stratum).push(r.row);
    }
    app.strata = state.strata.filter((s) => app.members.has(s.stratum));
  }

  async function fetchJSON(path) {
    const answer = await fetch(path, { cache: "no-store" });
    const body = await answer.json().catch(() => ({ error: `${answer.status} ${answer.statusText}` }));
    if (!answer.ok) throw new Error(body.error || String(answer.status));
    return body;
  }

  async function refresh() {
    const keep = app.strata.length ? currentRow() : undefined;
    ingest(await fetchJSON("api/state"));
    restorePosition(keep);
    renderAll();
  }

  async function checkForChanges() {
    if (app.pending || app.timers.size || document.hidden || !app.state) return;
    try {
      const { version } = await fetchJSON("api/version");
      if (version !== app.version && !app.pending) {
        await refresh();
        say("updated with changes made elsewhere");
      }
    } catch (err) {
      say(`cannot reach the review server: ${err.message}`, true);
    }
  }

  // ---- writing ------------------------------------------------------------------------

  // A refused write: the server's message, its status and (for 503) when to try again.
  class WriteError extends Error {
    constructor(message, status, retryAfter) {
      super(message);
      this.status = status;
      this.retryAfter = retryAfter;
    }
  }

  function post(path, body) {
    return fetch(path, {
      method: "POST",
      headers: { "Content-Type": "application/json" },
      body: JSON.stringify(body),
    }).then(async (answer) => {
      const reply = await answer.json().catch(() => ({ error: `${answer.status} ${answer.statusText}` }));
      if (!answer.ok) {
        throw new WriteError(reply.error || String(answer.status), answer.status,
          Math.max(1, Number(answer.headers.get("Retry-After")) || 2));
      }
      return reply;
    });
  }

  // The workspace was busy (503): nothing was written. The change stays on the page: a row
  // is marked "not saved" (do it again to retry), a text field keeps its text and is sent again.
  function keepUnsaved(body, err, retry) {
    const again = retry ? `the text is kept and sent again in ${err.retryAfter} s`
      : "the change is kept on this page; do it again to retry";
    say(`not saved: ${err.message} (${again})`, true, true);
    if (retry) retry(err.retryAfter * 1000);
    else if (body.row !== undefined) { app.unsaved.add(body.row); redrawCard(body.row); }
  }

  // Writes go one after another, so answers arrive in the order the keys were pressed.
  // `retry(delay)`, when given, sends the change again after a busy answer.
  function send(path, body, done, retry) {
    app.pending += 1;
    markPending();
    const job = app.chain
      .then(() => post(path, body))
      .then((reply) => {
        if (!retry && body.row !== undefined) app.unsaved.delete(body.row);   // a key's change landed
        applyReply(reply);
        if (done) say(done(reply));
        return reply;
      },
        async (err) => {
          if (err.status === 503) { keepUnsaved(body, err, retry); return null; }
          say(`not saved: ${err.message}`, true);
          try { await refresh(); } catch (e) { /* the status line already says it */ }
          return null;
        })
      .finally(() => { app.pending -= 1; markPending(); });
    app.chain = job.catch(() => null);
    return job;
  }

  // Text fields save after a short pause, on Enter, on leaving the field and on closing the tab.
  function sendLater(key, path, body, delay = 450) {
    const old = app.timers.get(key);
    if (old) clearTimeout(old.timer);
    const timer = setTimeout(() => flush(key), delay);
    app.timers.set(key, { timer, path, body });
    markPending();
  }

  function flush(key) {
    const job = app.timers.get(key);
    if (!job) return Promise.resolve(null);
    clearTimeout(job.timer);
    app.timers.delete(key);
    markPending();
    return send(job.path, job.body, () => "saved", (delay) => {
      if (!app.timers.has(key)) sendLater(key, job.path, job.body, delay);   // unless newer text waits
    });
  }

  // The tally is read once the writes have settled, so a burst of keys costs one tally.
  function tallyLater(delay = 120) {
    app.tallyDue = true;
    markPending();
    clearTimeout(app.tallyTimer);
    app.tallyTimer = setTimeout(readTally, delay);
  }

  async function readTally() {
    if (app.pending) { app.tallyTimer = setTimeout(readTally, 120); return; }
    app.tallyDue = false;
    app.tallyReading += 1;
    markPending();
    const ticket = ++app.tallyTicket;
    try {
      const tallied = await fetchJSON("api/tally");
      if (ticket === app.tallyTicket) {
        app.state.tally = tallied;
        renderStrata();
        renderCandidateStatus();
        renderTally();
      }
    } catch (err) {
      say(`cannot read the tally: ${err.message}`, true);
    } finally {
      app.tallyReading -= 1;
      markPending();
    }
  }

  function flushAll(onUnload = false) {
    for (const [key, job] of [...app.timers]) {
      if (onUnload) {
        clearTimeout(job.timer);
        app.timers.delete(key);
        fetch(job.path, { method: "POST", keepalive: true, headers: { "Content-Type": "application/json" },
          body: JSON.stringify(job.body) });
      } else {
        flush(key);
      }
    }
  }

  function applyReply(reply) {
    const st = app.state;
    let redraw = false;
    if (reply.row) {
      const item = app.rows.get(reply.row.row);
      Object.assign(item, { reviewed: reply.row.reviewed, tags: reply.row.tags, note: reply.row.note,
        updated_at: reply.row.updated_at });
    }
    if (reply.categories && JSON.stringify(reply.categories) !== JSON.stringify(st.categories)) {
      st.categories = reply.categories;
      redraw = true;
    }
    if (reply.names) {
      for (const s of st.strata) {
        const name = reply.names[s.stratum] || "";
        if (s.name !== name) { s.name = name; redraw = true; }
      }
      st.names = reply.names;
    }
    if (reply.tally) st.tally = reply.tally;
    else tallyLater();
    if (reply.version) app.version = reply.version;
    if (redraw) renderCandidate();
    else if (reply.row) { redrawCard(reply.row.row); renderCandidateStatus(); }
    else renderCandidateStatus();
    renderStrata();
    renderCategories();
    renderTally();
    renderProgress();
  }

  const toggle = (row, category) => send("api/review", { row, toggle: category }, (reply) =>
    `${category}: ${reply.row.tags.includes(category) ? "on" : "off"} · row ${row}`);
  const markReviewed = (row) => send("api/review", { row, reviewed: true },
    () => `row ${row} reviewed`);
  const reset = (row) => send("api/review", { row, reviewed: false },
    () => `row ${row} back to not reviewed`);
  const addCategory = (name) => send("api/category", { name }, () => `category added: ${name.trim().toLowerCase()}`);
  const removeCategory = (name) => send("api/category", { name, remove: true }, () => `category removed: ${name}`);

  // ---- drawing ------------------------------------------------------------------------

  function swapKeepingFocus(old, fresh) {
    const active = document.activeElement;
    if (active && active.id && old.contains(active)) {
      const twin = fresh.querySelector(`#${CSS.escape(active.id)}`);
      const start = active.selectionStart;
      const end = active.selectionEnd;
      if (twin) twin.replaceWith(active);
      old.replaceWith(fresh);
      active.focus();
      if (start !== null && start !== undefined) active.setSelectionRange(start, end);
    } else {
      old.replaceWith(fresh);
    }
  }

  function renderAll() {
    $("#workspace").textContent = app.state.workspace.split(/[\\/]/).filter(Boolean).pop() || app.state.workspace;
    $("#workspace").title = app.state.workspace;
    renderProgress();
    renderStrata();
    renderCandidate();
    renderCategories();
    renderTally();
  }

  function renderProgress() {
    const done = app.state.rows.filter((r) => r.reviewed).length;
    const total = app.state.rows.length;
    const bar = el("span", { class: "meter" }, el("span", { class: "fill" }));
    bar.firstChild.style.width = `${total ? (100 * done) / total : 0}%`;
    fill($("#progress"), 
      bar, el("span", { text: `${done} of ${total} queued errors reviewed` }),
      el("span", { class: "muted", text: ` · ${app.state.n_errors.toLocaleString()} errors in ` +
        `${app.state.n_rows.toLocaleString()} rows (${pct(app.state.error_rate)})` }));
  }

  function renderStrata() {
    const items = app.strata.map((s, index) => {
      const rows = app.members.get(s.stratum);
      const done = rows.filter((r) => app.rows.get(r).reviewed).length;
      const verdict = s.stratum === "rest" ? null : verdictOf(s.stratum);
      const fill = el("span", { class: "fill" });
      fill.style.width = `${(100 * done) / rows.length}%`;
      return el("button", {
        type: "button", class: `stratum${index === app.s ? " current" : ""}`,
        "aria-current": index === app.s ? "step" : null,
        data: { stratum: s.stratum },
        onclick: () => goStratum(index),
      },
      el("span", { class: "sid", text: s.stratum }),
      el("span", { class: "sname", text: s.stratum === "rest" ? "outside every candidate" : (s.name || "unnamed") }),
      el("span", { class: "meter small" }, fill),
      el("span", { class: "count", text: `${done}/${rows.length}` }),
      verdict ? el("span", { class: `chip ${verdict.verdict}`, text: verdict.verdict }) : null);
    });
    fill($("#strata"), el("h2", { text: "Candidates" }), ...items,
      el("p", { class: "hint", text: "] and [ move between them" }));
  }

  function visual(item, big) {
    if (item.has_image) {
      return el("img", { class: `thumb${app.state.image_kind === "pixels" ? " pixels" : ""}${big ? " big" : ""}`,
        src: `img/${item.row}`, alt: `image of row ${item.row}`, loading: "lazy", decoding: "async" });
    }
    if (item.text !== null && item.text !== undefined && item.text !== "") {
      // text_parts: [marked, piece] pairs from the server; every piece goes in as text, never as HTML
      const parts = Array.isArray(item.text_parts) && item.text_parts.length
        ? item.text_parts.map(([marked, piece]) => (marked ? el("mark", { text: piece }) : piece))
        : [String(item.text)];
      return el("blockquote", { class: `text${big ? " big" : ""}` }, parts);
    }
    return el("div", { class: "novisual", text: "no image or text stored" });
  }

  function truth(item) {
    if (item.label == null && item.prediction == null) return null;
    return el("p", { class: "truth" },
      el("span", { class: "k", text: app.state.label_name || "label" }), el("b", { text: show(item.label) }),
      el("span", { class: "arrow", "aria-hidden": "true", text: "→" }),
      el("span", { class: "k", text: app.state.prediction_name || "prediction" }),
      el("b", { class: item.label === item.prediction ? "" : "wrong", text: show(item.prediction) }));
  }

  function renderCandidate() {
    const s = stratum();
    const box = $("#candidate");
    const fresh = el("section", { id: "candidate", class: "candidate", "aria-live": "polite",
      data: { stratum: s.stratum } });
    const isRest = s.stratum === "rest";
    const verdict = isRest ? null : verdictOf(s.stratum);
    const rows = stratumRows();
    const done = rows.filter((r) => app.rows.get(r).reviewed).length;

    const head = el("header", { class: "cand-head" },
      el("div", { class: "cand-line" },
        el("span", { class: "sid big", text: s.stratum }),
        el("span", { class: "source", text: isRest ? "rest" : show(s.source) }),
        el("span", { id: "cand-count", class: "count", text: `${done} of ${rows.length} reviewed` }),
        isRest ? null : el("span", { id: "cand-verdict", class: `chip ${verdict ? verdict.verdict : ""}`,
          text: verdict ? verdict.verdict : "" })),
      el("h1", { class: "proposal", text: isRest ? "Errors outside every candidate" : show(s.description) }),
      el("p", { class: "summary", text: isRest
        ? "A random sample of the errors no queued candidate contains. Tag what you see: new categories found here are errors no proposal explains."
        : (s.summary || "") }),
      isRest ? null : el("p", { class: "stats" },
        `${Number(s.slice_n_rows).toLocaleString()} rows · ${Number(s.slice_errors).toLocaleString()} errors · error rate `,
        el("b", { text: pct(s.slice_error_rate) }), ` (${pct(s.slice_ci_low)}–${pct(s.slice_ci_high)})`,
        Number(s.slice_errors) !== Number(s.n_errors)
          ? ` · this stratum holds the ${Number(s.n_errors).toLocaleString()} no higher-ranked candidate claims` : ""));
    fresh.append(head);

    if (!isRest) {
      const input = el("input", { id: "cand-name", maxlength: "200", autocomplete: "off",
        placeholder: verdict && verdict.name_source === "tags" && verdict.name
          ? `unnamed; the tally uses its commonest tag, "${verdict.name}"` : "what goes wrong here?" });
      input.value = s.name || "";
      input.addEventListener("input", () => sendLater(`name:${s.stratum}`, "api/name",
        { slice_id: s.stratum, name: input.value }));
      input.addEventListener("change", () => flush(`name:${s.stratum}`));
      input.addEventListener("keydown", (ev) => { if (ev.key === "Enter") { ev.preventDefault(); input.blur(); } });
      input.addEventListener("blur", () => flush(`name:${s.stratum}`));
      head.append(el("div", { class: "name-field" },
        el("label", { for: "cand-name" }, "Name ", el("kbd", { text: "n" })), input,
        el("p", { class: "hint", text: "The name is the category this candidate stands for; its verdict asks whether most of its errors carry it." })));
    }

    if (s.exemplars && s.exemplars.length) {
      fresh.append(el("section", { class: "exemplars" },
        el("h2", { text: "Rows that show it" }),
        el("div", { class: "strip" }, s.exemplars.map((ex) => el("figure", { class: `ex ${ex.error ? "error" : "correct"}${ex.has_image ? "" : " textual"}` },
          visual(ex, false),
          el("figcaption", {},
            el("span", { text: ex.id != null ? show(ex.id) : `row ${ex.row}` }),
            ex.label != null || ex.prediction != null ? el("span", { text: `${show(ex.label)} → ${show(ex.prediction)}` }) : null,
            el("span", { class: ex.error ? "wrong" : "right", text: ex.error ? "error" : "correct" })))))));
    }

    const list = el("section", { class: "examples" },
      el("div", { class: "context" },
        el("span", { class: "sid", text: s.stratum }),
        el("span", { class: "cname", text: isRest ? "outside every candidate" : (s.name || "unnamed") }),
        el("span", { class: "cdesc", text: isRest ? "" : show(s.description) }),
        el("span", { id: "context-count", class: "count", text: `${done}/${rows.length}` })),
      el("h2", { text: `Queued errors, in sample order` }),
      el("p", { class: "hint", text: "Reviewing them from the top keeps every prefix a random sample of this stratum." }),
      el("div", { id: "cards", class: "cards" }, rows.map((r, k) => card(r, k))));
    fresh.append(list);
    swapKeepingFocus(box, fresh);
    remember();
    focusCard(false);
  }

  function renderCandidateStatus() {
    const s = stratum();
    const rows = stratumRows();
    const done = rows.filter((r) => app.rows.get(r).reviewed).length;
    const count = $("#cand-count");
    if (count) count.textContent = `${done} of ${rows.length} reviewed`;
    const short = $("#context-count");
    if (short) short.textContent = `${done}/${rows.length}`;
    const chip = $("#cand-verdict");
    const verdict = verdictOf(s.stratum);
    if (chip && verdict) { chip.className = `chip ${verdict.verdict}`; chip.textContent = verdict.verdict; }
  }

  function card(row, index) {
    const item = app.rows.get(row);
    const cats = app.state.categories;
    const named = stratum().name;
    const tagged = new Set(item.tags);
    const state = !item.reviewed ? "open" : (item.tags.length ? "tagged" : "plain");
    const unsaved = app.unsaved.has(row);
    const stateText = unsaved ? "last change not saved"
      : { open: "not reviewed", tagged: "reviewed", plain: "reviewed · no category" }[state];
    const toggles = cats.map((c, k) => el("button", {
      type: "button", class: `tag${c === named ? " named" : ""}`,
      "aria-pressed": tagged.has(c) ? "true" : "false",
      title: c === named ? "the name of this candidate" : null,
      data: { category: c },
      onclick: (ev) => { ev.stopPropagation(); select(index); toggle(row, c); },
    }, k < 9 ? el("kbd", { text: String(k + 1) }) : null, c));
    const wrong = app.state.wrong_label;
    const wrongToggle = el("button", {
      type: "button", class: "tag wrong", "aria-pressed": tagged.has(wrong) ? "true" : "false",
      title: "the dev set's label of this example is wrong", data: { category: wrong },
      onclick: (ev) => { ev.stopPropagation(); select(index); toggle(row, wrong); },
    }, el("kbd", { text: "w" }), "wrong label");
    const note = el("input", { id: `note-${row}`, class: "note", maxlength: "4000", autocomplete: "off",
      placeholder: "note (e)", "aria-label": `note on row ${row}` });
    note.value = item.note || "";
    note.addEventListener("input", () => sendLater(`note:${row}`, "api/review", { row, note: note.value }));
    note.addEventListener("keydown", (ev) => { if (ev.key === "Enter") { ev.preventDefault(); note.blur(); } });
    note.addEventListener("blur", () => flush(`note:${row}`));
    const meta = Object.entries(item.meta || {}).map(([k, v]) =>
      el("span", { class: "fact" }, el("span", { class: "k", text: k }), el("span", { text: show(v) })));
    const pictured = Boolean(item.has_image);
    return el("article", {
      class: `card ${state}${pictured ? " pictured" : ""}${index === app.i ? " current" : ""}${unsaved ? " unsaved" : ""}`,
      id: `card-${row}`,
      data: { row: String(row), reviewed: item.reviewed ? "1" : "0", tags: item.tags.join(";"),
        ...(unsaved ? { unsaved: "1" } : {}) },
      onclick: () => select(index),
    },
    pictured ? el("div", { class: "card-visual" }, visual(item, true)) : null,
    el("div", { class: "card-main" },
      el("div", { class: "card-head" },
        el("span", { class: "pos", text: `#${item.position}` }),
        el("span", { class: "ident", text: item.id != null ? `${item.id} · row ${row}` : `row ${row}` }),
        el("span", { class: `state ${unsaved ? "unsaved" : state}`, text: stateText })),
      pictured ? null : visual(item, true),
      truth(item),
      meta.length ? el("div", { class: "facts" }, meta) : null,
      item.image_path ? el("p", { class: "hint path", text: item.image_path }) : null,
      el("div", { class: "toggles" }, toggles.length ? toggles
        : el("span", { class: "hint", text: stratum().stratum === "rest" ? "No categories yet: press a to add one."
          : "No categories yet: press a to add one, or n to name the candidate." }), wrongToggle),
      note));
  }

  function redrawCard(row) {
    const old = document.getElementById(`card-${row}`);
    if (!old) return;
    const index = stratumRows().indexOf(row);
    swapKeepingFocus(old, card(row, index));
  }

  function focusCard(scroll = true) {
    document.querySelectorAll(".card.current").forEach((c) => c.classList.remove("current"));
    const node = document.getElementById(`card-${currentRow()}`);
    if (node) {
      node.classList.add("current");
      if (scroll) node.scrollIntoView({ block: "nearest" });
    }
    remember();
  }

  function renderCategories() {
    const counts = new Map();
    for (const r of app.state.rows) for (const t of r.tags) counts.set(t, (counts.get(t) || 0) + 1);
    const names = new Map(Object.entries(app.state.names || {}).map(([sid, n]) => [n, sid]));
    const items = app.state.categories.map((c, k) => {
      const used = counts.get(c) || 0;
      return el("li", { data: { category: c } },
        el("kbd", { class: k < 9 ? "" : "none", text: k < 9 ? String(k + 1) : "·" }),
        el("span", { class: "cname", text: c }),
        names.has(c) ? el("span", { class: "badge", text: `names ${names.get(c)}` }) : null,
        el("span", { class: "count", text: used ? `${used}×` : "unused" }),
        !used && !names.has(c) ? el("button", { type: "button", class: "remove", title: `remove ${c}`,
          "aria-label": `remove category ${c}`, onclick: () => removeCategory(c) }, "×") : null);
    });
    fill($("#categories"), ...items);
    $("#categories-note").textContent = app.state.categories.length
      ? "Digits toggle the first nine on the current example; click any to toggle it."
      : "None yet. Add the kinds of mistake you see; digits toggle them.";
  }

  function intervalBar(value, low, high) {
    const bar = el("span", { class: "ibar", "aria-hidden": "true" },
      el("span", { class: "range" }), el("span", { class: "point" }));
    if (low !== null && high !== null) {
      bar.children[0].style.left = `${100 * low}%`;
      bar.children[0].style.width = `${100 * Math.max(0, high - low)}%`;
    }
    if (value !== null) bar.children[1].style.left = `${100 * value}%`;
    else bar.children[1].hidden = true;
    return bar;
  }

  function renderTally() {
    const t = app.state.tally;
    const sum = t.summary;
    const level = Math.round(100 * sum.confidence_level);
    const cats = t.categories.map((c) => el("tr", {
      class: `cat${c.category === app.state.reserved ? " untagged" : ""}`,
      data: { category: c.category, nTagged: raw(c.n_tagged), share: raw(c.share), shareLow: raw(c.share_low),
        shareHigh: raw(c.share_high), headroom: raw(c.headroom) },
    },
    el("th", { scope: "row", text: c.category }),
    el("td", { class: "num", text: String(c.n_tagged) }),
    el("td", { class: "share" }, intervalBar(c.share, c.share_low, c.share_high),
      el("span", { class: "nums" }, el("b", { text: pct(c.share) }), ` ${pct(c.share_low)}–${pct(c.share_high)}`)),
    el("td", { class: "num", title: "error rate if this category were fixed", text: pct(c.headroom) })));
    const verdicts = t.slices.map((s) => el("li", {
      class: "verdict",
      data: { sliceId: s.slice_id, name: s.name, verdict: s.verdict, precision: raw(s.precision),
        precisionLow: raw(s.precision_low), precisionHigh: raw(s.precision_high),
        moreNeeded: raw(s.more_needed), nReviewed: raw(s.n_reviewed) },
    },
    el("span", { class: "sid", text: s.slice_id }),
    el("span", { class: "vname", text: s.name || "unnamed" }),
    el("span", { class: `chip ${s.verdict}`, text: s.verdict }),
    el("span", { class: "vline" },
      s.n_reviewed ? `${pct(s.precision, 0)} carry its name (${pct(s.precision_low, 0)}–${pct(s.precision_high, 0)}), ${s.n_reviewed} reviewed`
        : "nothing reviewed yet",
      s.verdict === "undecided" && s.more_needed > 0 ? ` · about ${s.more_needed} more to decide` : "")));
    fill($("#tally"), 
      el("h2", {}, "Tally ", el("span", { class: "hint", text: `${sum.n_reviewed} reviewed · ${level}% intervals` })),
      el("table", { class: "shares" },
        el("thead", {}, el("tr", {}, el("th", { text: "category" }), el("th", { class: "num", text: "tagged" }),
          el("th", { text: "share of all errors" }), el("th", { class: "num", text: "if fixed" }))),
        el("tbody", {}, cats)),
      el("p", { class: "hint", text: `"if fixed": the error rate (now ${pct(sum.error_rate)}) with that category's errors gone.` }),
      el("h3", { text: "Verdicts" }),
      el("ul", { class: "verdicts" }, verdicts),
      el("p", { class: "hint", text: `A candidate is confirmed when at least ${pct(sum.threshold, 0)} of its errors carry its name, rejected when fewer do, at ${level}% confidence.` }),
      t.warnings.length ? el("p", { class: "warn", text: t.warnings.join(" ") }) : null);
  }

  // ---- moving -------------------------------------------------------------------------

  function select(index) {
    if (index === app.i) return;
    app.i = index;
    focusCard(false);
  }

  function goStratum(index, at) {
    if (index < 0 || index >= app.strata.length) return;
    flushAll();
    const changed = index !== app.s;
    app.s = index;
    app.i = at === undefined ? firstOpen(stratumRows()) : (at < 0 ? stratumRows().length - 1 : at);
    if (changed) { renderStrata(); renderCandidate(); window.scrollTo({ top: 0 }); }
    focusCard();
  }

  function next() {
    if (app.i < stratumRows().length - 1) { app.i += 1; focusCard(); }
    else if (app.s < app.strata.length - 1) goStratum(app.s + 1, 0);
    else say("end of the queue");
  }

  function previous() {
    if (app.i > 0) { app.i -= 1; focusCard(); }
    else if (app.s > 0) goStratum(app.s - 1, -1);
  }

  // ---- keys and buttons ---------------------------------------------------------------

  function typing(target) {
    return target instanceof HTMLInputElement || target instanceof HTMLTextAreaElement
      || target instanceof HTMLSelectElement || (target && target.isContentEditable);
  }

  function onKey(ev) {
    const help = $("#help");
    if (ev.key === "Escape") {
      if (help.open) help.close();
      else if (typing(ev.target)) ev.target.blur();
      return;
    }
    if (typing(ev.target) || ev.ctrlKey || ev.metaKey || ev.altKey || !app.state) return;
    if (help.open && ev.key !== "?") return;
    const row = currentRow();
    const key = ev.key;
    if (/^[1-9]$/.test(key)) {
      const category = app.state.categories[Number(key) - 1];
      if (category) toggle(row, category);
      else say(`no category ${key} yet: press a to add one`, true);
    } else if (key === "j" || key === "ArrowDown") next();
    else if (key === "k" || key === "ArrowUp") previous();
    else if (key === "]") goStratum(app.s + 1);
    else if (key === "[") goStratum(app.s - 1);
    else if (key === "w") toggle(row, app.state.wrong_label);
    else if (key === "r") { markReviewed(row); next(); }
    else if (key === "u") reset(row);
    else if (key === "e") { const n = document.getElementById(`note-${row}`); if (n) n.focus(); }
    else if (key === "n") { const n = $("#cand-name"); if (n) { n.focus(); n.select(); } else say("the rest stratum has no name"); }
    else if (key === "a") $("#new-category").focus();
    else if (key === "?") { if (help.open) help.close(); else help.showModal(); }
    else return;
    ev.preventDefault();
  }

  function importSheet(file) {
    if (!file) return;
    app.pending += 1;
    markPending();
    say(`importing ${file.name}…`);
    file.arrayBuffer()
      .then((bytes) => fetch("api/import", { method: "POST", body: bytes,
        headers: { "Content-Type": "text/csv", "X-Sheet-Name": encodeURIComponent(file.name) } }))
      .then(async (answer) => {
        const reply = await answer.json().catch(() => ({ error: `${answer.status}` }));
        if (!answer.ok) throw new Error(reply.error || String(answer.status));
        await refresh();
        const n = reply.imported;
        say(`imported ${file.name}: ${n.recorded} changes written, ${n.unchanged} unchanged, ${n.blank} blank lines`);
      })
      .catch((err) => say(`nothing imported: ${err.message}`, true))
      .finally(() => { app.pending -= 1; markPending(); $("#import-file").value = ""; });
  }

  function wire() {
    document.addEventListener("keydown", onKey);
    $("#add-category").addEventListener("submit", (ev) => {
      ev.preventDefault();
      const input = $("#new-category");
      const name = input.value.trim();
      if (!name) { input.blur(); return; }
      input.value = "";
      input.blur();
      addCategory(name).then((reply) => { if (!reply && !input.value) input.value = name; });   // refused: kept
    });
    $("#import").addEventListener("click", () => $("#import-file").click());
    $("#import-file").addEventListener("change", (ev) => importSheet(ev.target.files[0]));
    $("#help-open").addEventListener("click", () => $("#help").showModal());
    $("#help-close").addEventListener("click", () => $("#help").close());
    window.addEventListener("pagehide", () => flushAll(true));
    document.addEventListener("visibilitychange", () => { if (document.hidden) flushAll(); else checkForChanges(); });
    setInterval(checkForChanges, 4000);
  }

  wire();
  fetchJSON("api/state")
    .then((state) => {
      ingest(state);
      if (!app.strata.length) {
        fill($("#candidate"), el("p", { class: "loading", text: "The queue is empty." }));
        document.body.dataset.ready = "1";
        return;
      }
      restorePosition();
      renderAll();
      focusCard();
      document.body.dataset.ready = "1";
    })
    .catch((err) => {
      fill($("#candidate"), el("p", { class: "loading error", text: `Cannot load the review: ${err.message}` }));
      document.body.dataset.ready = "error";
    });
})();
