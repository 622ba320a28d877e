// The review page: keyboard first, one key per decision, every decision saved at once.
"use strict";
(function () {
  const PAGE = 50;
  const token = document.querySelector('meta[name="review-token"]').content;
  const state = { tab: "clusters", offset: 0, total: 0, items: [], item: 0, member: 0,
                  marked: null, undo: [], busy: false };
  const $ = (id) => document.getElementById(id);

  function api(path, body) {
    const sep = path.includes("?") ? "&" : "?";
    const options = body === undefined ? { headers: { "X-Review-Token": token } } : {
      method: "POST", body: JSON.stringify(body),
      headers: { "X-Review-Token": token, "Content-Type": "application/json" } };
    return fetch(body === undefined ? `${path}${sep}token=${encodeURIComponent(token)}` : path, options)
      .then(async (r) => {
        const data = await r.json();
        if (!r.ok) throw new Error(data.error || r.statusText);
        return data;
      });
  }
  const image = (row, size) => `/api/image?row=${row}&size=${size}&token=${encodeURIComponent(token)}`;
  const say = (text) => { $("status").textContent = text; };

  function summary() {
    return api("/api/summary").then((s) => {
      for (const key of ["clusters", "conflicts", "files"]) {
        document.querySelector(`[data-count="${key}"]`).textContent = s[key];
      }
      state.summary = s;
    });
  }

  function load(keepPlace) {
    return api(`/api/items?tab=${state.tab}&offset=${state.offset}&limit=${PAGE}`).then((page) => {
      state.items = page.items;
      state.total = page.total;
      if (!keepPlace) { state.item = 0; state.member = 0; }
      state.item = Math.min(state.item, Math.max(page.items.length - 1, 0));
      render();
    });
  }

  function el(tag, attrs, ...children) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "class") node.className = v; else node.setAttribute(k, v);
    }
    for (const child of children) node.append(child);
    return node;
  }

  function badges(m) {
    const out = el("p", { class: "badges" });
    const actions = new Set(m.decisions.map((d) => d.action));
    for (const action of ["drop", "relabel", "separate", "join", "keep"]) {
      if (actions.has(action)) {
        const d = m.decisions.find((x) => x.action === action);
        const text = action === "relabel" ? `relabel → ${d.value}` : action;
        out.append(el("span", { class: `badge ${action}`, "data-decision": action }, text));
      }
    }
    if (state.marked === m.row) out.append(el("span", { class: "badge marked" }, "marked"));
    return out;
  }

  function render() {
    document.querySelectorAll("#tabs button").forEach((b) =>
      b.setAttribute("aria-selected", String(b.dataset.tab === state.tab)));
    const box = $("items");
    box.replaceChildren();
    if (!state.items.length) box.append(el("p", { class: "empty" }, "Nothing to review here."));
    state.items.forEach((item, i) => {
      const card = el("article", { class: "item" + (i === state.item ? " current" : ""),
                                   "data-item": String(i) });
      if (item.kind === "cluster") {
        const flags = (item.conflict ? " · labels disagree" : "") + (item.leak ? " · in several splits" : "");
        card.append(el("h2", {}, `Cluster ${item.id} · ${item.size} files${flags}`));
        if (item.conflict) card.classList.add("conflict"); else if (item.leak) card.classList.add("leak");
      }
      const strip = el("div", { class: "strip" });
      item.members.forEach((m, j) => {
        const current = i === state.item && j === state.member;
        const fig = el("figure", { class: (m.keeper ? "keeper " : "") + (current ? "current" : ""),
                                   "data-row": String(m.row) });
        fig.append(el("img", { src: image(m.row, "thumb"), alt: m.path, loading: "lazy",
                               width: "160", height: "160" }));
        const best = m.evidence[0];
        const evidence = item.kind !== "cluster" ? "" : m.keeper ? "kept file" : !best ? "no hash to compare" :
          best.hash === "sha256" ? "byte-identical to the kept file" : `${best.bits} bits from the kept file (${best.what})`;
        const label = m.label_original ? `${m.label} (was ${m.label_original})` : (m.label || "no label");
        const issues = m.issues ? m.issues.split(";").join(", ") : "";
        fig.append(el("figcaption", {}, el("span", { class: "path" }, m.path),
          el("span", {}, `${label} · ${m.split || "left out"}${m.size ? " · " + m.size : ""}`),
          evidence ? el("span", { class: "evidence", title: m.evidence.map((e) => `${e.what}: ${e.bits} bits`).join("; ") }, evidence) : "",
          m.link ? el("span", { class: "evidence link", title: "how the group stage verified this file against " + m.link.to },
            `${m.link.kind} link to ${m.link.to}` +
            (m.link.likeness ? ` · likeness ${Number(m.link.likeness).toFixed(3)}` : "") +
            (m.link.blemish ? ` · blemish ${Number(m.link.blemish).toFixed(2)}` : "")) : "",
          issues ? el("span", { class: "issues" }, issues) : "",
          m.muted ? el("span", { class: "muted" }, `muted: ${m.muted.split(";").join(", ")}`) : "",
          m.likely_label ? el("span", { class: "issues" }, `features suggest ${m.likely_label}`) : "",
          badges(m)));
        fig.addEventListener("click", () => { state.item = i; state.member = j; render(); });
        strip.append(fig);
      });
      card.append(strip);
      box.append(card);
    });
    const first = state.total ? state.offset + 1 : 0;
    $("pager").textContent = `${first}–${state.offset + state.items.length} of ${state.total}` +
      (state.total > PAGE ? " · PgDn / PgUp for more" : "");
    const now = box.querySelector("figure.current");
    if (now) now.scrollIntoView({ block: "nearest" });
  }

  const current = () => {
    const item = state.items[state.item];
    return item ? { item, member: item.members[state.member] } : null;
  };

  function decide(change, label) {
    if (state.busy) return Promise.resolve();
    state.busy = true;
    return api("/api/decide", change).then((r) => {
      state.undo.push({ change, previous: r.previous });
      // the page is redrawn before it says so, so a key pressed after the message acts on it
      return load(true).then(() => say(`${label}: saved (${r.decisions} decisions in the file)`));
    }).catch((e) => say(`not saved: ${e.message}`)).finally(() => { state.busy = false; });
  }

  function toggle(action, extra, label) {
    const now = current();
    if (!now) return;
    const m = now.member;
    const has = m.decisions.find((d) => d.action === action &&
      (extra.other === undefined || d.value === otherPath(extra.other) || d.path === otherPath(extra.other)));
    const note = $("note").value;
    decide({ row: m.row, action, note, ...extra, remove: Boolean(has) },
           `${has ? "removed " : ""}${label} ${m.path}`);
  }

  function otherPath(row) {
    for (const item of state.items) for (const m of item.members) if (m.row === row) return m.path;
    return null;
  }

  function undo() {
    const last = state.undo.pop();
    if (!last) { say("nothing to undo"); return; }
    const { change, previous } = last;
    let back;
    if (previous) back = { ...change, value: previous.value, note: previous.note, remove: false };
    else back = { ...change, remove: !change.remove };
    state.busy = true;
    api("/api/decide", back).then(() => load(true)).then(() => say(`undone: ${change.action}`))
      .catch((e) => say(`undo failed: ${e.message}`)).finally(() => { state.busy = false; });
  }

  function move(items, members) {
    if (items) {
      const next = state.item + items;
      if (next >= 0 && next < state.items.length) { state.item = next; state.member = 0; }
      else if (next >= state.items.length) return page(1);
      else if (next < 0 && state.offset > 0) return page(-1, true);
    }
    if (members) {
      const item = state.items[state.item];
      if (item) state.member = Math.max(0, Math.min(item.members.length - 1, state.member + members));
    }
    render();
  }

  function page(step, toEnd) {
    const offset = state.offset + step * PAGE;
    if (offset < 0 || offset >= state.total) return;
    state.offset = offset;
    load(false).then(() => { if (toEnd) { state.item = state.items.length - 1; render(); } });
  }

  function tab(name) {
    state.tab = name; state.offset = 0;
    load(false);
  }

  function relabel() {
    const now = current();
    if (!now) return;
    $("relabel-path").textContent = now.member.path;
    $("relabel-input").value = now.member.label;
    $("relabel").hidden = false;
    $("relabel-input").focus();
    $("relabel-input").select();
  }

  function full() {
    const now = current();
    if (!now) return;
    $("full-img").src = image(now.member.row, "full");
    $("full-path").textContent = now.member.path;
    $("full").hidden = false;
  }

  function rerun() {
    say("re-running group, split and report…");
    state.busy = true;
    api("/api/rerun", {}).then(() => summary()).then(() => load(true))
      .then(() => say("re-ran group, split and report; the page shows the new manifest"))
      .catch((e) => say(`re-run failed: ${e.message}`)).finally(() => { state.busy = false; });
  }

  function closeOverlays() {
    for (const id of ["relabel", "full", "help"]) $(id).hidden = true;
  }

  document.addEventListener("keydown", (event) => {
    const typing = event.target.tagName === "INPUT";
    if (event.key === "Escape") { closeOverlays(); if (typing) event.target.blur(); return; }
    if (typing || event.ctrlKey || event.metaKey || event.altKey) {
      if (event.ctrlKey && event.key === "z" && !typing) { event.preventDefault(); undo(); }
      return;
    }
    if (act(event.key)) event.preventDefault();
  });

  // one table of actions for the keys and the buttons (the buttons serve touch screens)
  function act(key) {
    const now = current();
    const keys = {
      ArrowDown: () => move(1, 0), ArrowUp: () => move(-1, 0),
      ArrowRight: () => move(0, 1), ArrowLeft: () => move(0, -1),
      PageDown: () => page(1), PageUp: () => page(-1),
      1: () => tab("clusters"), 2: () => tab("conflicts"), 3: () => tab("files"),
      d: () => toggle("drop", {}, "drop"),
      r: () => relabel(),
      s: () => {
        if (!now || now.item.kind !== "cluster" || state.member === 0) { say("separate: choose a file other than the kept one"); return; }
        toggle("separate", { other: now.item.members[0].row }, "separate");
      },
      m: () => { if (now) { state.marked = now.member.row; say(`marked ${now.member.path}; j joins another file with it`); render(); } },
      j: () => {
        if (state.marked === null || !now || now.member.row === state.marked) { say("join: mark a file with m, then choose another"); return; }
        toggle("join", { other: state.marked }, "join");
      },
      k: () => toggle("keep", {}, "keep"),
      u: () => undo(),
      f: () => full(), Enter: () => full(),
      R: () => rerun(),
      "?": () => { $("help").hidden = !$("help").hidden; },
      "/": () => $("note").focus(),
    };
    const action = keys[key];
    if (action) action();
    return Boolean(action);
  }
  document.querySelectorAll("#actions button").forEach((b) => b.addEventListener("click", () => act(b.dataset.key)));

  $("relabel-form").addEventListener("submit", (event) => {
    event.preventDefault();
    const now = current();
    const value = $("relabel-input").value.trim();
    $("relabel").hidden = true;
    $("relabel-input").blur();
    if (now && value && value !== now.member.label) {
      decide({ row: now.member.row, action: "relabel", value, note: $("note").value },
             `relabel ${now.member.path} → ${value}`);
    }
  });
  document.querySelectorAll("#tabs button").forEach((b) => b.addEventListener("click", () => tab(b.dataset.tab)));
  $("rerun").addEventListener("click", rerun);
  $("help-button").addEventListener("click", () => { $("help").hidden = !$("help").hidden; });
  for (const id of ["full", "help"]) $(id).addEventListener("click", closeOverlays);

  function ready() {
    const unknown = state.summary.unknown;
    const lines = unknown.map((u) => `line ${u.line}: ${u.action} ${u.path}${u.value ? " → " + u.value : ""}`);
    say(unknown.length ? `ready: ? lists the keys. ${unknown.length} decisions name files not in the manifest ` +
        `and are not applied (${lines.slice(0, 3).join("; ")}${unknown.length > 3 ? "; …" : ""})` : "ready: ? lists the keys");
  }

  summary().then(() => load(false)).then(ready)
    .catch((e) => say(`cannot load: ${e.message}`));
})();
