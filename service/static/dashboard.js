// mixroute dashboard: reads the JSON API of the app that served this page, draws inline SVG.
// No libraries, nothing fetched from anywhere but this origin.
"use strict";

// The chart's colours come from palette.json, which the PNG plot (service/plot.py) reads too.
const PALETTE_PATH = "/dashboard/static/palette.json";
const UNCOLOURED = "#5d6b6f";  // until the palette has loaded (or if it cannot be read)
const REFRESH_MS = 5000;
const SVG_NS = "http://www.w3.org/2000/svg";

const view = { model: null, role: null, keysRequired: false, snapshots: [], busy: false, again: false,
               editing: null, reasonWords: null, palette: null, groups: [],
               // flagged messages: the group picked per message id, and what was sent for it
               picked: {}, corrected: {},
               // flagged ids the state holds as corrections (id -> group), so a reload still
               // says which were confirmed or reassigned
               learned: {} };

function $(id) { return document.getElementById(id); }
function colour(group) {
  const groups = view.palette ? view.palette.groups : [UNCOLOURED];
  return groups[group % groups.length];
}
function markColour(kind) {
  return (view.palette && view.palette.marks[kind]) || UNCOLOURED;
}

async function loadPalette() {
  if (view.palette) return;
  try {
    const response = await fetch(PALETTE_PATH, { headers: { "Accept": "application/json" } });
    if (!response.ok) return;
    view.palette = await response.json();
    view.groupSignature = null;  // redraw the cards in their colours
    const key = document.querySelector(".alert-key");
    if (key) key.style.background = markColour("alert");
  } catch (error) {
    view.palette = null;  // grey until a later refresh reads it
  }
}

// What a rollback's marker says (the PNG plot's service.plot.rollback_text has the same words).
function rollbackText(row) {
  return `rolled back to snapshot ${row.snapshot_id}, replay ${row.replay ? "on" : "off"}`;
}

function el(tag, attrs, children) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (k === "text") node.textContent = v; else node.setAttribute(k, v);
  }
  for (const child of children || []) node.appendChild(child);
  return node;
}

function svg(tag, attrs, text) {
  const node = document.createElementNS(SVG_NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
  if (text !== undefined) node.textContent = text;
  return node;
}

function apiKey() { return sessionStorage.getItem("mixroute-key") || ""; }

async function api(method, path, body) {
  const headers = { "Accept": "application/json" };
  const key = apiKey();
  if (key) headers["Authorization"] = "Bearer " + key;
  if (body !== undefined) headers["Content-Type"] = "application/json";
  const response = await fetch(path, {
    method, headers, body: body === undefined ? undefined : JSON.stringify(body),
  });
  const data = response.status === 204 ? null : await response.json().catch(() => null);
  if (!response.ok) {
    const detail = data && data.detail ? data.detail : response.statusText;
    const error = new Error(`${response.status}: ${typeof detail === "string" ? detail : response.statusText}`);
    error.status = response.status;
    error.data = data;
    throw error;
  }
  return data;
}

function toast(message, isError) {
  const box = $("toast");
  box.textContent = message;
  box.className = isError ? "toast error" : "toast";
  box.hidden = false;
  clearTimeout(toast.timer);
  toast.timer = setTimeout(() => { box.hidden = true; }, 6000);
}

function notice(message) {
  const box = $("notice");
  box.textContent = message || "";
  box.hidden = !message;
}

function groupName(group, labels) {
  const label = labels[group];
  return label ? `${group} · ${label}` : `group ${group}`;
}

function timeText(seconds, span) {
  const d = new Date(seconds * 1000);
  if (span > 2 * 86400) return d.toISOString().slice(5, 10) + " " + d.toTimeString().slice(0, 5);
  if (span > 600) return d.toTimeString().slice(0, 5);
  if (span > 20) return d.toTimeString().slice(0, 8);
  return d.toTimeString().slice(0, 8) + "." + String(d.getMilliseconds()).padStart(3, "0").slice(0, 1);
}

// A tick step of 1, 2 or 5 times a power of ten giving about four intervals up to `top`.
function niceStep(top) {
  const raw = top / 4;
  const power = Math.pow(10, Math.floor(Math.log10(raw)));
  for (const m of [1, 2, 5, 10]) if (m * power >= raw) return m * power;
  return 10 * power;
}

// -- chart ------------------------------------------------------------------------------------

// Group ids of a history row (rows written before groups had ids: 0..K-1).
function rowIds(row) {
  return row.group_ids || row.weights.map((_, g) => g);
}

function drawChart(rows, alerts, labels, events = [], snapshots = []) {
  const box = $("chart");
  box.textContent = "";
  // a narrower drawing on a phone, so its ticks stay readable when scaled to the screen
  const W = box.clientWidth && box.clientWidth < 600 ? 520 : 960;
  const H = 300, left = 46, right = 14, top = 12, bottom = 30;
  const root = svg("svg", { viewBox: `0 0 ${W} ${H}`, id: "weights-chart" });
  box.appendChild(root);
  if (!rows.length) {
    root.appendChild(svg("text", { x: W / 2, y: H / 2, "text-anchor": "middle", class: "empty" },
      "no checkpoints yet: the model is still learning its warm-up documents"));
    $("legend").textContent = "";
    return;
  }
  const t0 = rows[0].time, t1 = rows[rows.length - 1].time;
  const span = Math.max(t1 - t0, 1e-6);
  let ymax = 0;
  for (const row of rows) for (const w of row.weights) ymax = Math.max(ymax, w);
  const step = niceStep(Math.max(ymax * 1.05, 0.01));
  ymax = Math.min(1, Math.ceil((ymax * 1.05) / step) * step);
  const x = (t) => left + (rows.length === 1 ? 0.5 : (t - t0) / span) * (W - left - right);
  const y = (w) => top + (1 - w / ymax) * (H - top - bottom);

  const grid = svg("g", { class: "grid" });
  const digits = step >= 0.1 ? 1 : step >= 0.01 ? 2 : 3;
  for (let w = 0; w <= ymax + step / 2; w += step) {
    grid.appendChild(svg("line", { x1: left, x2: W - right, y1: y(w), y2: y(w), class: "gridline" }));
    grid.appendChild(svg("text", { x: left - 6, y: y(w) + 4, "text-anchor": "end", class: "tick" },
      w.toFixed(digits)));
  }
  if (rows.length > 1) {
    for (let i = 0; i <= 4; i++) {
      const t = t0 + (span * i) / 4;
      const anchor = i === 0 ? "start" : i === 4 ? "end" : "middle";
      grid.appendChild(svg("text", { x: x(t), y: H - 10, "text-anchor": anchor, class: "tick" },
        timeText(t, span)));
    }
  }
  grid.appendChild(svg("line", { x1: left, x2: W - right, y1: y(0), y2: y(0), class: "axis" }));
  root.appendChild(grid);

  const marks = svg("g", { class: "alerts" });
  for (const alert of alerts) {
    if (alert.time < t0 - span * 0.02 || alert.time > t1 + span * 0.02) continue;
    const ax = x(Math.min(Math.max(alert.time, t0), t1));
    const mark = svg("g", { class: "alert", "data-version": alert.version });
    mark.appendChild(svg("line", { x1: ax, x2: ax, y1: top, y2: y(0), class: "alert-line",
      stroke: markColour("alert") }));
    mark.appendChild(svg("rect", { x: ax - 4, y: top - 4, width: 8, height: 8, class: "alert-mark",
      transform: `rotate(45 ${ax} ${top})`, fill: markColour("alert") }));
    mark.appendChild(svg("title", {},
      `drift alert at version ${alert.version}: ${alert.reason}`));
    marks.appendChild(mark);
  }
  root.appendChild(marks);

  // births, merges and retirements (a circle at the top), snapshots (a tick at the bottom)
  const inside = (t) => t >= t0 - span * 0.02 && t <= t1 + span * 0.02;
  const changes = svg("g", { class: "group-events" });
  for (const event of events) {
    if (!inside(event.time)) continue;
    const ex = x(Math.min(Math.max(event.time, t0), t1));
    const mark = svg("g", { class: `group-event ${event.kind}`, "data-version": event.version,
      "data-kind": event.kind });
    mark.appendChild(svg("line", { x1: ex, x2: ex, y1: top, y2: y(0), class: "event-line" }));
    mark.appendChild(svg("circle", { cx: ex, cy: top + 2, r: 4, class: "event-mark",
      fill: markColour(event.kind) }));
    mark.appendChild(svg("title", {}, `${event.kind} of group(s) ${event.groups.join(", ")} at ` +
      `version ${event.version}${event.undone ? " (undone by a rollback)" : ""}: ${event.reason}`));
    changes.appendChild(mark);
  }
  for (const snapshot of snapshots) {
    if (!inside(snapshot.created)) continue;
    const sx = x(Math.min(Math.max(snapshot.created, t0), t1));
    const mark = svg("g", { class: `snapshot-mark ${snapshot.kind}`, "data-kind": snapshot.kind });
    mark.appendChild(svg("line", { x1: sx, x2: sx, y1: y(0) - 6, y2: y(0) + 2, class: "snap-tick",
      stroke: markColour(snapshot.kind === "pre-rollback" ? "pre-rollback" : "snapshot") }));
    mark.appendChild(svg("title", {}, `${snapshot.kind} snapshot ${snapshot.id} of version ` +
      `${snapshot.version}: ${snapshot.reason}`));
    changes.appendChild(mark);
  }
  root.appendChild(changes);

  // rollbacks: the history row a rollback wrote (its weights are the restored snapshot's), so
  // the jump in the lines beside it says where it came from
  const rollbacks = rows.filter((row) => row.kind === "rollback");
  const back = svg("g", { class: "rollbacks" });
  for (const row of rollbacks) {
    const rx = x(row.time);
    const words = `version ${row.version}: ${rollbackText(row)}`;
    const leftwards = rx > left + 0.6 * (W - left - right);  // the label on the side with room
    const tint = markColour("rollback");
    const mark = svg("g", { class: "rollback-mark", "data-version": row.version,
      "data-snapshot": row.snapshot_id, "data-replay": row.replay ? "on" : "off",
      role: "img", "aria-label": words });
    mark.appendChild(svg("line", { x1: rx, x2: rx, y1: top, y2: y(0), class: "rollback-line",
      stroke: tint }));
    mark.appendChild(svg("path", { d: `M${rx - 5},${top + 10} h10 l-5,8 z`, class: "rollback-flag",
      fill: tint }));
    mark.appendChild(svg("text", { x: leftwards ? rx - 7 : rx + 7, y: top + 18, class: "rollback-label",
      "text-anchor": leftwards ? "end" : "start", fill: tint }, `rollback to ${row.snapshot_id}`));
    mark.appendChild(svg("title", {}, words));
    back.appendChild(mark);
  }
  root.appendChild(back);
  // the chart is one image to assistive technology: its name carries the rollbacks' words
  box.setAttribute("aria-label", "mixture weights over time" + (rollbacks.length
    ? `; ${rollbacks.map((row) => `version ${row.version} ${rollbackText(row)}`).join("; ")}` : ""));

  // one line per group id, over the versions where that group existed, in steps: a version's
  // weights hold until the next version (so a rollback is a jump at its own time, as in the PNG)
  const ids = [];
  for (const row of rows) for (const id of rowIds(row)) if (!ids.includes(id)) ids.push(id);
  const lines = svg("g", { class: "lines" });
  for (const g of ids) {
    const points = [];
    let held = null;  // the weight of the previous version, when the group was in it
    for (const row of rows) {
      const at = rowIds(row).indexOf(g);
      if (at < 0) {  // gone (merged, retired, or undone by a rollback): held up to this version
        if (held !== null) points.push(`${x(row.time).toFixed(1)},${y(held).toFixed(1)}`);
        held = null;
        continue;
      }
      const rx = x(row.time).toFixed(1);
      if (held !== null) points.push(`${rx},${y(held).toFixed(1)}`);
      points.push(`${rx},${y(row.weights[at]).toFixed(1)}`);
      held = row.weights[at];
    }
    const path = svg("polyline", { points: points.join(" "), class: "series", "data-group": g,
      stroke: colour(g) });
    path.appendChild(svg("title", {}, groupName(g, labels)));
    lines.appendChild(path);
  }
  root.appendChild(lines);

  const legend = $("legend");
  legend.textContent = "";
  const lastRow = rows[rows.length - 1];
  const lastIds = rowIds(lastRow);
  lastIds.forEach((g, at) => {
    const swatch = el("span", { class: "swatch", style: `background:${colour(g)}` });
    legend.appendChild(el("li", {}, [swatch,
      el("span", { text: `${groupName(g, labels)} (${lastRow.weights[at].toFixed(3)})` })]));
  });
}

// -- groups, flagged documents, snapshots -------------------------------------------------------

function drawGroups(groups) {
  // redraw only on a change, so an Edit button never moves (or goes stale) under the pointer
  const signature = JSON.stringify([view.model, view.role, groups]);
  if (signature === view.groupSignature) return;
  view.groupSignature = signature;
  const box = $("groups");
  // a redraw must not take the keyboard focus away: note the focused button, focus it again
  const active = document.activeElement;
  const focused = active && box.contains(active) && active.dataset.group != null
    ? `button.${active.classList[0]}[data-group="${active.dataset.group}"]` : null;
  box.textContent = "";
  const maxWeight = Math.max(...groups.map((g) => g.weight), 1e-9);
  for (const group of groups) {
    const title = el("h3", {}, [
      group.label ? el("span", { text: `${group.group} · ${group.label}` })
                  : el("span", { class: "unlabelled", text: `group ${group.group} (no label)` }),
      el("span", { text: group.weight.toFixed(3) }),
    ]);
    const bar = el("div", { class: "meter" }, [el("span", {
      style: `width:${(100 * group.weight / maxWeight).toFixed(1)}%;background:${colour(group.group)}`,
    })]);
    const size = el("div", { class: "size",
      text: `${Math.round(group.expected_documents)} expected documents` +
            (group.destination ? ` · goes to ${group.destination}` : "") });
    const top = el("div", { class: "terms" }, [el("b", { text: "top" }),
      document.createTextNode(group.top_terms.map((t) => t.term).join(", ") || "–")]);
    const distinct = el("div", { class: "terms" }, [el("b", { text: "distinctive" }),
      document.createTextNode(group.distinctive_terms.map((t) => t.term).join(", ") || "–")]);
    const card = el("article", { class: "group", "data-group": group.group,
      style: `border-top-color:${colour(group.group)}` }, [title, size, bar, top, distinct]);
    const moved = labelMoved(group);
    if (moved) card.appendChild(moved);
    if (group.label_stale) {
      card.classList.add("label-stale");
      card.dataset.labelStale = "true";
    }
    if (view.role === "admin" && group.label_stale) {
      const still = el("button", { type: "button", class: "refresh-label", "data-group": group.group,
        text: "Label still fits",
        "aria-label": `Keep the label of group ${group.group}: record its words now as what the label describes` });
      still.addEventListener("click", () => refreshLabel(group, still));
      card.appendChild(still);
    }
    if (view.role === "admin") {
      const edit = el("button", { type: "button", class: "edit-label", "data-group": group.group,
        text: "Edit label", "aria-label": `Edit the label and destination of group ${group.group}` });
      edit.addEventListener("click", () => openLabelForm(card, group));
      card.appendChild(edit);
    }
    box.appendChild(card);
  }
  const again = focused ? box.querySelector(focused) : null;
  if (again) again.focus();
}

// How far a labelled group's words moved since its label was set; a warning when stale.
function labelMoved(group) {
  if (group.label_divergence == null) return null;
  const value = group.label_divergence.toFixed(3);
  const limit = group.label_stale_threshold != null ? group.label_stale_threshold.toFixed(2) : "?";
  const since = group.label_words_version != null ? ` since version ${group.label_words_version}` : "";
  if (!group.label_stale) {
    return el("div", { class: "label-moved", text: `words moved ${value} bit${since} (stale above ${limit})` });
  }
  return el("p", { class: "label-warning", role: "note" }, [
    el("strong", { text: "Label may no longer fit. " }),
    document.createTextNode(`The group's words moved ${value} bit${since}, above ${limit}: ` +
      "check its terms, then edit the label or keep it."),
  ]);
}

async function refreshLabel(group, button) {
  button.disabled = true;
  try {
    await api("PATCH", `/models/${encodeURIComponent(view.model)}/groups/${group.group}/label`,
      { refresh: true });
    toast(`Group ${group.group}: its words now are what the label describes.`);
    view.groupSignature = null; view.focusGroup = group.group;
    await refresh();
  } catch (error) {
    button.disabled = false;
    toast(`Keeping the label failed: ${error.message}`, true);
  }
}

function cell(label, attrs, children) {
  return el("td", { ...(attrs || {}), "data-label": label }, children);
}

function clock(seconds) { return new Date(seconds * 1000).toTimeString().slice(0, 8); }

function ageText(seconds) {
  if (seconds < 90) return `${Math.round(seconds)} s ago`;
  if (seconds < 5400) return `${Math.round(seconds / 60)} min ago`;
  return `${(seconds / 3600).toFixed(1)} h ago`;
}

// -- label editing (admin) ------------------------------------------------------------------------

function openLabelForm(card, group) {
  view.editing = group.group;  // the periodic refresh leaves the cards alone meanwhile
  const id = (name) => `label-${group.group}-${name}`;
  const labelInput = el("input", { id: id("label"), name: "label", maxlength: "200",
    value: group.label || "" });
  const destInput = el("input", { id: id("destination"), name: "destination", maxlength: "200",
    value: group.destination || "", placeholder: "e.g. a mailbox or queue" });
  const cancel = el("button", { type: "button", class: "cancel", text: "Cancel" });
  const save = el("button", { type: "submit", text: "Save" });
  const form = el("form", { class: "label-form", "data-group": group.group }, [
    el("label", { for: id("label") }, [document.createTextNode("label"), labelInput]),
    el("label", { for: id("destination") }, [document.createTextNode("destination"), destInput]),
    el("div", { class: "buttons" }, [cancel, save]),
  ]);
  // back to the card's Edit button once the cards are redrawn (keyboard users stay in place)
  const close = () => {
    view.editing = null; view.groupSignature = null; view.focusGroup = group.group; refresh();
  };
  cancel.addEventListener("click", close);
  form.addEventListener("keydown", (event) => { if (event.key === "Escape") close(); });
  form.addEventListener("submit", async (event) => {
    event.preventDefault();
    save.disabled = true;
    const body = { label: labelInput.value.trim() || null,
                   destination: destInput.value.trim() || null };
    try {
      await api("PUT", `/models/${encodeURIComponent(view.model)}/groups/${group.group}/label`, body);
      toast(`Group ${group.group} is now ${body.label ? `"${body.label}"` : "unlabelled"}` +
            (body.destination ? `, going to ${body.destination}.` : "."));
      close();
    } catch (error) {
      save.disabled = false;
      toast(`Saving the label failed: ${error.message}`, true);
    }
  });
  const button = card.querySelector("button.edit-label");
  if (button) button.replaceWith(form); else card.appendChild(form);
  labelInput.focus();
}

// -- alerts, worker health --------------------------------------------------------------------

function drawAlerts(alerts) {
  const body = $("alerts");
  body.textContent = "";
  if (!alerts.length) { emptyRow(body, 5, "no alerts raised"); return; }
  for (const alert of [...alerts].reverse()) {
    body.appendChild(el("tr", { "data-alert": alert.id, "data-version": alert.version }, [
      cell("when", { text: new Date(alert.time * 1000).toLocaleString() }),
      cell("version", { class: "num", text: String(alert.version) }),
      cell("kind", {}, [el("span", { class: "alert-kind", text: alert.kind })]),
      cell("reason", { class: "alert-reason", text: alert.reason }),
      cell("value / threshold", { class: "num",
        text: `${Number(alert.value).toPrecision(3)} / ${Number(alert.threshold).toPrecision(3)}` }),
    ]));
  }
}

function setStat(id, text, state) {
  const node = $(id);
  node.textContent = text;
  node.className = state || "";
}

function drawHealth(ready, model, name) {
  if (ready) {
    const entry = ready.models.find((m) => m.name === name);
    const age = entry ? entry.worker_heartbeat_age_seconds : null;
    const stale = ready.reasons.some((r) => r.startsWith(`model '${name}'`));
    if (ready.redis !== "reachable") setStat("heartbeat", "unknown (Redis unreachable)", "bad");
    else if (age == null) setStat("heartbeat", "none seen: no worker is learning", "bad");
    else setStat("heartbeat", ageText(age) + (stale ? " (stale)" : ""), stale ? "bad" : "ok");
    setStat("redis-state", ready.redis === "reachable" ? "reachable" : "unreachable",
      ready.redis === "reachable" ? "ok" : "bad");
  } else {
    setStat("heartbeat", "unknown (readiness did not answer)", "bad");
    setStat("redis-state", "unknown", "bad");
  }
  const stream = model && model.stream;
  if (!stream) setStat("backlog", "unknown (the stream did not answer)", "bad");
  else if (stream.lag == null) setStat("backlog", `${stream.length} in the stream`, "");
  else setStat("backlog", `${stream.lag} message${stream.lag === 1 ? "" : "s"}`,
    stream.lag > 0 ? "" : "ok");
}

// Mark a panel as not answering (its last content stays, dimmed) or as answering again.
function panelState(id, error) {
  const panel = $(id);
  let note = panel.querySelector(".unavailable-note");
  if (!error) {
    panel.classList.remove("unavailable");
    if (note) note.remove();
    for (const node of panel.querySelectorAll(".stale")) node.classList.remove("stale");
    return;
  }
  panel.classList.add("unavailable");
  if (!note) {
    note = el("p", { class: "unavailable-note" });
    const head = panel.querySelector(".panel-head");
    if (head) head.after(note); else panel.prepend(note);
  }
  note.textContent = `Not answering (${error.message}); showing what was last loaded, if anything.`;
  for (const node of panel.children) {
    if (!node.classList.contains("panel-head") && node !== note) node.classList.add("stale");
  }
}

function emptyRow(body, columns, text) {
  body.appendChild(el("tr", { class: "empty-row" }, [el("td", { colspan: columns, text })]));
}

function drawFlagged(documents, labels) {
  // redraw only on a change, so a picker or a button never moves under the pointer or focus
  const signature = JSON.stringify([view.model, view.role, documents, labels, view.corrected,
    view.learned,
    view.groups.map((g) => g.group), view.reasonWords ? 1 : 0]);
  if (signature === view.flaggedSignature) return;
  const active = document.activeElement;
  const focusId = active && active.closest && active.closest("#flagged") ? active.id : null;
  view.flaggedSignature = signature;
  const body = $("flagged");
  body.textContent = "";
  if (!documents.length) { emptyRow(body, 6, "nothing flagged since this API process started"); return; }
  documents.forEach((doc, row) => {
    // each reason in words, its name beside it (the name the API's review_reasons carry)
    const words = view.reasonWords || {};
    const reasons = cell("why it needs a look", { class: "why" }, [el("ul", { class: "reasons" },
      doc.reasons.map((r) => el("li", { "data-reason": r }, [
        document.createTextNode(words[r] || r), document.createTextNode(" "),
        ...(words[r] ? [el("code", { text: `(${r})` })] : []),
      ])))]);
    body.appendChild(el("tr", { "data-document": doc.id }, [
      cell("when", { text: clock(doc.time) }),
      cell("document", { text: doc.id || "–" }),
      cell("group", { text: `${groupName(doc.group, labels)}` +
        (doc.probability != null ? ` (${doc.probability.toFixed(2)})` : "") }),
      reasons,
      cell("text", { class: "text", text: doc.text + (doc.truncated ? " …" : "") }),
      cell("correction", { class: "correct" }, correctionControls(doc, row, labels)),
    ]));
  });
  if (focusId && $(focusId)) $(focusId).focus();
}

// Confirm (the group it was routed to) or Reassign (the group picked) one flagged message: a
// correction the model learns as a labelled document (POST .../corrections, admin role).
function correctionControls(doc, row, labels) {
  const done = view.corrected[doc.id] || learnedStatus(doc, labels);
  const status = el("span", { class: "correct-status", role: "status", id: `correct-status-${row}`,
    text: done ? done.text : "" });
  if (done && done.error) status.classList.add("error");
  if (view.role !== "admin") {
    return [el("span", { class: "small", text: "needs the admin role" }), status];
  }
  const pickerId = `correct-group-${row}`;
  const picker = el("select", { id: pickerId, class: "group-picker",
    "aria-label": `Group for message ${doc.id}` });
  const ids = view.groups.length ? view.groups.map((g) => g.group) : [doc.group];
  if (!ids.includes(doc.group)) ids.unshift(doc.group);
  const picked = view.picked[doc.id] != null ? view.picked[doc.id] : doc.group;
  for (const g of ids) {
    const option = el("option", { value: String(g),
      text: groupName(g, labels) + (g === doc.group ? " (routed)" : "") });
    if (g === picked) option.selected = true;
    picker.appendChild(option);
  }
  const confirm = el("button", { type: "button", class: "confirm", id: `correct-confirm-${row}`,
    text: "Confirm", "aria-label": `Confirm message ${doc.id} belongs to ${groupName(doc.group, labels)}` });
  const reassign = el("button", { type: "button", class: "reassign", id: `correct-reassign-${row}`,
    text: "Reassign", "aria-label": `Reassign message ${doc.id} to the group picked` });
  reassign.disabled = picked === doc.group;
  picker.addEventListener("change", () => {
    view.picked[doc.id] = Number(picker.value);
    reassign.disabled = Number(picker.value) === doc.group;
  });
  const send = async (group, verb) => {
    confirm.disabled = true; reassign.disabled = true;
    status.textContent = "sending…";
    try {
      const answer = await api("POST", `/models/${encodeURIComponent(view.model)}/corrections`,
        { documents: [{ id: doc.id, group }] });
      const queued = answer.corrections && answer.corrections[0];
      const text = `${verb} to ${groupName(group, labels)}: queued` +
        (queued && queued.stream_id ? ` (${queued.stream_id})` : "");
      view.corrected[doc.id] = { group, text };
      status.textContent = text;
      toast(`Message ${doc.id} ${verb.toLowerCase()} to ${groupName(group, labels)}; ` +
        "the model learns it as a labelled message.");
      refresh();
    } catch (error) {
      const text = `not sent: ${error.message}`;
      view.corrected[doc.id] = { group, text, error: true };
      status.textContent = text;
      status.classList.add("error");
      confirm.disabled = false; reassign.disabled = Number(picker.value) === doc.group;
      toast(`The correction of ${doc.id} failed: ${error.message}`, true);
    }
  };
  confirm.addEventListener("click", () => send(doc.group, "Confirmed"));
  reassign.addEventListener("click", () => send(Number(picker.value), "Reassigned"));
  const label = el("label", { for: pickerId, class: "visually-hidden", text: `group for ${doc.id}` });
  return [el("div", { class: "correct-row" }, [label, picker, confirm, reassign]), status];
}

// A flagged message the state holds as a correction (sent before this page was loaded, or
// learned since): confirmed when its group is the one it was routed to, else reassigned.
function learnedStatus(doc, labels) {
  if (!(doc.id in view.learned)) return null;
  const group = view.learned[doc.id];
  const verb = group === doc.group ? "Confirmed" : "Reassigned";
  return { group, text: `${verb} to ${groupName(group, labels)}: learned` };
}

// Which flagged ids are corrections the state holds (GET .../corrections?ids=...).
async function loadLearned(base, documents) {
  const ids = documents.map((d) => d.id).filter((id) => id);
  if (!ids.length) { view.learned = {}; return; }
  const query = ids.map((id) => `ids=${encodeURIComponent(id)}`).join("&");
  try {
    const answer = await api("GET", `${base}/corrections?count=${ids.length}&${query}`);
    const learned = {};
    for (const d of answer.documents) if (d.source === "correction") learned[d.id] = d.group;
    view.learned = learned;
  } catch (error) {
    // keep what was known: the count line says when the corrections do not answer
  }
}

function drawCorrections(answer, error) {
  const node = $("corrections-count");
  if (error) {
    node.textContent = `corrections: unknown (${error.message})`;
    node.dataset.count = "";
    return;
  }
  const learned = (answer.sources && answer.sources.correction) || 0;
  const examples = (answer.sources && answer.sources.example) || 0;
  node.textContent = `corrections: ${learned} learned` +
    (examples ? `, ${examples} examples` : "") + `, ${answer.queued} queued`;
  node.dataset.count = String(learned);
  node.dataset.queued = String(answer.queued);
}

function drawDaily(days, labels) {
  // one row per day (newest first), one column per group that received any message
  const head = $("daily-head");
  const body = $("daily");
  head.textContent = "";
  body.textContent = "";
  const names = Object.keys(days).sort().reverse();
  const groups = [...new Set(names.flatMap((d) => Object.keys(days[d])))].map(Number).sort((a, b) => a - b);
  head.appendChild(el("tr", {}, [el("th", { text: "day (UTC)" }),
    ...groups.map((g) => el("th", { class: "num", text: groupName(g, labels) })),
    el("th", { class: "num", text: "all" })]));
  if (!groups.length) { emptyRow(body, 2, "nothing routed by the mail intake in these days"); return; }
  for (const day of names) {
    const counts = days[day];
    const total = Object.values(counts).reduce((a, b) => a + b, 0);
    body.appendChild(el("tr", {}, [el("td", { text: day }),
      ...groups.map((g) => el("td", { class: "num", text: String(counts[g] || 0) })),
      el("td", { class: "num", text: String(total) })]));
  }
}

function drawSnapshots(snapshots) {
  // redraw only on a change, so a button never moves (or goes stale) under the pointer
  const signature = JSON.stringify([view.model, view.role, snapshots]);
  if (signature === view.snapshotSignature) return;
  view.snapshotSignature = signature;
  view.snapshots = snapshots;
  const body = $("snapshots");
  body.textContent = "";
  const admin = view.role === "admin";
  $("snapshot-hint").textContent = admin ? "restore asks first" : "restoring needs the admin role";
  if (!snapshots.length) { emptyRow(body, 6, "no snapshots yet"); return; }
  for (const snap of [...snapshots].reverse()) {
    const button = el("button", { class: "restore", type: "button", "data-snapshot": snap.id,
      text: "Restore" });
    button.disabled = !admin;
    button.addEventListener("click", () => askRestore(snap));
    body.appendChild(el("tr", { "data-snapshot": snap.id }, [
      cell("id", { text: snap.id }),
      cell("version", { class: "num", text: String(snap.version) }),
      cell("documents", { class: "num", text: String(snap.documents_learned) }),
      cell("kind", { text: snap.kind }),
      cell("reason", { text: snap.reason }),
      el("td", {}, admin ? [button] : []),
    ]));
  }
}

function askRestore(snap) {
  $("confirm-text").textContent =
    `Snapshot ${snap.id} holds version ${snap.version} (${snap.documents_learned} documents ` +
    `learned, reason: ${snap.reason}). Restoring makes it the state every router answers from.`;
  $("confirm-replay").checked = false;
  const dialog = $("confirm-dialog");
  dialog.dataset.snapshot = snap.id;
  dialog.showModal();
}

async function onConfirmClose() {
  const dialog = $("confirm-dialog");
  if (dialog.returnValue !== "restore") return;
  const id = dialog.dataset.snapshot;
  try {
    const result = await api("POST",
      `/models/${encodeURIComponent(view.model)}/snapshots/${encodeURIComponent(id)}/restore`,
      { replay: $("confirm-replay").checked });
    toast(`Restored snapshot ${result.snapshot_id}: now version ${result.version} ` +
          `(the replaced version ${result.replaced_version} is kept as ${result.safety_snapshot_id}).`);
    await refresh();
  } catch (error) {
    if (error.status === 503 && error.data && error.data.written) {
      // done on the primary, not confirmed by the replicas: say so, and show the new version
      toast(`Restored, but the replicas have not confirmed it: ${error.message}`, true);
      await refresh();
      return;
    }
    toast(`Restore failed: ${error.message}`, true);
  }
}

// -- loading ------------------------------------------------------------------------------------

async function loadRole() {
  const info = await api("GET", "/auth");
  view.keysRequired = info.keys_required;
  view.role = info.role;
  $("role").textContent = info.keys_required ? `role ${info.role || "none"}` : "open (loopback)";
  $("key-form").hidden = !info.keys_required;
}

async function loadModels() {
  const select = $("model-select");
  const data = await api("GET", "/models");
  const names = data.models.map((m) => m.name);
  const wanted = new URLSearchParams(location.search).get("model");
  if (!view.model || !names.includes(view.model)) {
    view.model = names.includes(wanted) ? wanted : names[0] || null;
  }
  select.textContent = "";
  for (const name of names) {
    const option = el("option", { value: name, text: name });
    if (name === view.model) option.selected = true;
    select.appendChild(option);
  }
  return data.models.find((m) => m.name === view.model) || null;
}

// Each part of the page from its own request: when some fail (Redis down), the others still show.
const PARTS = [
  ["history", "weights-panel", "weights over time"],
  ["alerts", "alerts-panel", "alerts"],
  ["groups", "groups-panel", "groups"],
  ["flagged", "flagged-panel", "flagged"],
  ["snapshots", "snapshots-panel", "snapshots"],
  ["daily", "daily-panel", "routed per day"],
  ["model", "health-panel", "the model"],
  ["stream", "health-panel", "backlog"],
  ["ready", "health-panel", "worker health"],
];

async function loadReasonWords() {
  if (view.reasonWords) return;
  try {
    const data = await api("GET", "/review-reasons");
    view.reasonWords = Object.fromEntries(data.reasons.map((r) => [r.name, r.words]));
  } catch (error) {
    view.reasonWords = null;  // the codes are shown until the words load
  }
}

async function refresh() {
  if ($("confirm-dialog").open) return;  // nothing changes while a restore is being confirmed
  if (view.busy) { view.again = true; return; }
  view.busy = true;
  try {
    await Promise.all([loadRole(), loadPalette()]);
    if (view.keysRequired && !view.role) {
      notice("Type an API key (read or admin role) to see the models.");
      return;
    }
    const model = await loadModels();
    if (!model) { notice("No model yet: create one with POST /models or `mixroute models create`."); return; }
    await loadReasonWords();
    const base = `/models/${encodeURIComponent(model.name)}`;
    const paths = {
      history: `${base}/drift/history?limit=2000`,
      alerts: `${base}/drift/alerts?count=500`,
      groups: `${base}/groups?top=8`,
      flagged: `${base}/flagged?count=15`,
      corrections: `${base}/corrections?count=0`,
      snapshots: `${base}/snapshots`,
      events: `${base}/events?limit=500`,
      daily: `${base}/routed/daily?days=7`,
      model: base,
      ready: "/ready",
    };
    const names = Object.keys(paths);
    const settled = await Promise.allSettled(names.map((n) => api("GET", paths[n])));
    const got = {}, failed = {};
    names.forEach((n, i) => {
      const result = settled[i];
      if (result.status === "fulfilled") got[n] = result.value;
      // a 503 from readiness still carries its body (what is unreachable)
      else if (n === "ready" && result.reason.data && result.reason.data.models) got[n] = result.reason.data;
      else failed[n] = result.reason;
    });
    const refused = Object.entries(failed).find(([n, e]) => n !== "corrections" &&
      (e.status === 401 || e.status === 403));
    if (refused) throw refused[1];
    // the model answers from memory without its stream: the backlog is what did not answer
    if (got.model && !got.model.stream) failed.stream = new Error("the stream did not answer");

    const labels = {};
    if (got.groups) for (const g of got.groups.groups) if (g.label) labels[g.group] = g.label;
    // a group merged away still has its line: its label lives on in the survivor's record
    if (got.groups) for (const g of got.groups.groups) {
      for (const gone of g.merged_labels || []) if (gone.label && !(gone.group in labels)) labels[gone.group] = gone.label;
    }
    const shown = got.model || model;
    $("version").textContent = `version ${shown.version}`;
    $("version").dataset.version = String(shown.version);
    $("learned").textContent = `${shown.documents_learned} documents learned`;
    notice(shown.warmed_up ? "" : `Model ${shown.name}: ${shown.status}.`);
    if (got.history) {
      // group events get their own markers; the alert diamonds keep to drift and stream alerts
      const driftAlerts = (got.alerts ? got.alerts.alerts : []).filter((a) => !a.kind.startsWith("group-"));
      drawChart(got.history.rows, driftAlerts, labels, got.events ? got.events.events : [],
        got.snapshots ? got.snapshots.snapshots : []);
    }
    if (got.alerts) drawAlerts(got.alerts.alerts);
    if (got.groups) view.groups = got.groups.groups;
    if (got.groups && view.editing === null) drawGroups(got.groups.groups);
    if (view.focusGroup != null) {
      const button = document.querySelector(`button.edit-label[data-group="${view.focusGroup}"]`);
      if (button) button.focus();
      view.focusGroup = null;
    }
    $("groups-hint").textContent = view.role === "admin"
      ? "size = mixture weight and expected documents; Edit label names a group and its destination"
      : "size = mixture weight and expected documents; labels need the admin role";
    if (got.flagged) {
      await loadLearned(base, got.flagged.documents);
      drawFlagged(got.flagged.documents, labels);
    }
    drawCorrections(got.corrections, failed.corrections);
    if (got.daily) drawDaily(got.daily.days, labels);
    if (got.snapshots) drawSnapshots(got.snapshots.snapshots);
    drawHealth(got.ready, got.model, model.name);

    const down = {};  // error message -> the parts that failed with it
    const panels = {};
    for (const [part, panel, words] of PARTS) {
      const error = failed[part];
      if (error) {
        (down[error.message] = down[error.message] || []).push(words);
        // the status strip shows its own unknowns; the panels say they are stale
        if (panel !== "health-panel") panels[panel] = error;
      } else if (!(panel in panels)) panels[panel] = null;
    }
    for (const [panel, error] of Object.entries(panels)) panelState(panel, error);
    const up = PARTS.filter(([part]) => !failed[part]).map(([, , words]) => words);
    const downText = Object.entries(down).map(([message, parts]) => `${parts.join(", ")} (${message})`);
    $("degraded").hidden = downText.length === 0;
    $("degraded-text").textContent = downText.length === 0 ? "" :
      `Not answering: ${downText.join("; ")}. Still answering: ${up.join(", ") || "nothing"}` +
      (got.ready && got.ready.redis !== "reachable" ? " (from this API's memory; Redis is unreachable)." : ".");
    document.body.dataset.degraded = downText.length ? "true" : "false";
    const now = Date.now() / 1000;
    $("updated").textContent = clock(now) + (downText.length ? " (partly)" : "");
    $("updated").dataset.time = String(now);
    document.body.dataset.loaded = "true";
  } catch (error) {
    notice(error.status === 401 || error.status === 403
      ? `The API refused the key (${error.message}).` : `Cannot load: ${error.message}`);
  } finally {
    view.busy = false;
    if (view.again) { view.again = false; refresh(); }
  }
}

document.addEventListener("DOMContentLoaded", () => {
  $("key-form").addEventListener("submit", (event) => {
    event.preventDefault();
    sessionStorage.setItem("mixroute-key", $("key-input").value.trim());
    $("key-input").value = "";
    refresh();
  });
  $("model-select").addEventListener("change", (event) => {
    view.model = event.target.value;
    refresh();
  });
  $("confirm-dialog").addEventListener("close", onConfirmClose);
  refresh();
  setInterval(refresh, REFRESH_MS);
});
