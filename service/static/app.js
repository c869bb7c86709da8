// Operator page: plain JavaScript against REST v1. The token lives in sessionStorage (this tab only).
// Fields the service may not send (an older server, a retention-deleted heatmap) are shown as "–", never guessed.
"use strict";

const $ = (id) => document.getElementById(id);
const store = window.sessionStorage;
const DASH = "–";
const DRIFT_TEXT = {
  ok: "production images look like the training images",
  drifting: "production images no longer look like the training images: check light, camera and material lot",
  not_enough_images: "not enough production images yet to judge",
  no_reference: "this model carries no drift reference",
};
const NO_CHOICE = "choose a part type to see its drift";
let current = null; // the inspection shown in the result panel
let urls = { original: null, overlay: null }; // object URLs of the shown images, revoked when replaced
let offset = 0; // paging of the recent list
let timer = null;
let partTypes = []; // names of the part types served, from GET /v1/part-types
let partTypeChosen = false; // the operator picked the part type (one served: the page picks it, and says nothing)

function token() { return store.getItem("knowngood.token") || ""; }

function say(text) {
  const box = $("message");
  box.textContent = text || "";
  box.hidden = !text;
}

// fetch with the bearer token; a problem+json error becomes an Error carrying its detail
async function api(path, options = {}) {
  const headers = Object.assign({ Authorization: "Bearer " + token() }, options.headers || {});
  const response = await fetch(path, Object.assign({}, options, { headers }));
  if (!response.ok) {
    let detail = response.status + " " + response.statusText;
    try { const problem = await response.json(); detail = problem.detail || problem.title || detail; } catch (e) { /* not JSON */ }
    const error = new Error(detail);
    error.status = response.status;
    throw error;
  }
  const type = response.headers.get("content-type") || "";
  return type.includes("json") ? response.json() : response.blob();
}

function missing(x) { return x === null || x === undefined || x === ""; }
function dash(x) { return missing(x) ? DASH : String(x); }
function fmt(x) { return missing(x) || !Number.isFinite(Number(x)) ? DASH : Number(x).toFixed(3); }
function when(t) { return missing(t) ? DASH : new Date(t).toLocaleString(); }

// the model that made a verdict: `model: {id, revision, sha256}`, or `model_id` / `model_revision` beside it
function modelOf(insp) {
  const m = insp && typeof insp.model === "object" && insp.model !== null ? insp.model : {};
  const id = m.id ?? (typeof insp.model === "string" ? insp.model : insp.model_id);
  return { id: dash(id), revision: dash(m.revision ?? insp.model_revision) };
}
function modelLabel(insp) { const m = modelOf(insp); return m.id + " rev " + m.revision; }

function cell(row, text) {
  const td = document.createElement("td");
  td.textContent = dash(text);
  row.appendChild(td);
  return td;
}

async function signIn(event) {
  event.preventDefault();
  store.setItem("knowngood.token", $("token").value.trim());
  store.setItem("knowngood.operator", $("operator").value.trim());
  try {
    await refreshPartTypes();
  } catch (error) {
    store.removeItem("knowngood.token");
    say("Sign-in failed: " + error.message);
    return;
  }
  say("");
  showApp(true);
  await refresh();
}

function signOut() {
  store.removeItem("knowngood.token");
  showApp(false);
  $("model-info").textContent = "not signed in";
}

function showApp(on) {
  $("login").hidden = on;
  $("app").hidden = !on;
  $("sign-out").hidden = !on;
  $("drift-banner").hidden = !on;
  if (timer) { clearInterval(timer); timer = null; }
  if (on) { timer = setInterval(() => { if ($("watch").checked) refresh(); }, 5000); }
}

// ---- part types --------------------------------------------------------------------------------------------

function partType() { return $("part-type").value; }
function partTypePath(name) { return "/v1/part-types/" + encodeURIComponent(name); }
function severalPartTypes() { return partTypes.length > 1; }

function option(value, text) {
  const o = document.createElement("option");
  o.value = value;
  o.textContent = text;
  return o;
}

// rebuilds a select's options only when the names change (a rebuild would close it under the operator's pointer);
// the choice survives a rebuild while its part type is still served
function fillSelect(select, first, names) {
  const wanted = [first.value, ...names].join("\n");
  if ([...select.options].map((o) => o.value).join("\n") === wanted) return;
  const kept = select.value;
  select.replaceChildren(option(first.value, first.text), ...names.map((n) => option(n, n)));
  select.value = names.includes(kept) ? kept : first.value;
}

// one part type: chosen for the operator and out of sight, as before part types existed; several: the operator
// chooses, and a part type the page chose alone is dropped, so no part is inspected as a type nobody picked
async function refreshPartTypes() {
  const list = await api("/v1/part-types");
  partTypes = (list.items || []).map((p) => p.name);
  fillSelect($("part-type"), { value: "", text: "choose…" }, partTypes);
  if (partTypes.length === 1) $("part-type").value = partTypes[0];
  else if (!partTypeChosen) $("part-type").value = "";
  if (!partType()) showKept("part-type", false);
  $("part-type-field").hidden = !severalPartTypes();
  fillSelect($("f-part-type"), { value: "", text: "all" }, partTypes);
  $("f-part-type-field").hidden = !severalPartTypes() && !$("f-part-type").value;
}

function choosePartType() {
  partTypeChosen = Boolean(partType());
  showKept("part-type", false);
  Promise.allSettled([refreshModel(), refreshDrift()]); // each shows its own state; nothing else waits for them
}

// the header: the chosen part type's model (one served: its model, as before part types existed)
async function refreshModel() {
  const name = partType();
  if (!name) {
    $("model-info").textContent = partTypes.length ? partTypes.length + " part types: choose one to inspect"
      : "no model loaded yet";
    return;
  }
  const m = await api(partTypePath(name) + "/model");
  const threshold = m.threshold && typeof m.threshold === "object" ? m.threshold.value : m.threshold;
  $("model-info").textContent = (severalPartTypes() ? "part type " + name + " · " : "") + "model " + dash(m.id)
    + " rev " + dash(m.revision) + " · threshold " + fmt(threshold) + " · " + dash(m.runtime);
}

// ---- inspect -----------------------------------------------------------------------------------------------

async function inspect(event) {
  event.preventDefault();
  const file = $("file").files[0];
  if (!file) { say("Choose an image first."); return; }
  const kind = partType();
  if (!kind && severalPartTypes()) { say("Choose the part type first."); return; }
  clearResult(); // nothing of the previous part may stay on screen beside this file's name
  say("");
  const form = new FormData();
  form.append("image", file);
  const station = $("station").value.trim();
  if (kind) form.append("part_type", kind);
  if ($("part-id").value.trim()) form.append("part_id", $("part-id").value.trim());
  if (station) form.append("station", station);
  $("inspect-btn").disabled = true;
  try {
    const result = await api("/v1/inspections", { method: "POST", body: form });
    // the next part must not inherit this one's id or file; the station and the part type stay, and say so
    $("part-id").value = "";
    $("file").value = "";
    showKept("station", Boolean(station));
    showKept("part-type", Boolean(kind));
    await show(result, file);
    await refresh();
  } catch (error) {
    clearResult();
    say("Not inspected: " + file.name + ": " + error.message);
  } finally {
    $("inspect-btn").disabled = false;
  }
}

// the station and the part type stay in their fields for the next part; a tag says so until the operator changes it
function showKept(field, on) {
  $(field + "-kept").hidden = !on;
  $(field).classList.toggle("kept", on);
}

function setImage(which, blob) {
  if (urls[which]) URL.revokeObjectURL(urls[which]);
  urls[which] = blob ? URL.createObjectURL(blob) : null;
  if (urls[which]) $(which).src = urls[which];
  else $(which).removeAttribute("src");
}

function clearResult() {
  current = null;
  $("result").hidden = true;
  for (const id of ["result-id", "result-part-type", "verdict", "score", "threshold", "result-model",
    "result-revision", "result-meta", "review-state", "legend-mid", "legend-high"]) $(id).textContent = "";
  $("verdict").className = "verdict";
  $("review-history").replaceChildren();
  setImage("original", null);
  setImage("overlay", null);
}

// localFile: the file just uploaded, shown when the service keeps no picture of the original
async function show(insp, localFile = null) {
  current = insp;
  $("result").hidden = false;
  $("result-id").textContent = insp.id;
  $("result-part-type").textContent = dash(insp.part_type);
  const verdict = $("verdict");
  verdict.textContent = dash(insp.verdict);
  verdict.className = "verdict " + (insp.verdict || "");
  $("score").textContent = fmt(insp.score);
  $("threshold").textContent = fmt(insp.threshold);
  const model = modelOf(insp);
  $("result-model").textContent = model.id;
  $("result-revision").textContent = model.revision;
  showBar(insp);
  showLegend(insp.threshold);
  const size = insp.image ? insp.image.width + " × " + insp.image.height + " px" : null;
  $("result-meta").textContent = [insp.part_id && "part " + insp.part_id, insp.station && "station " + insp.station,
    when(insp.time), size].filter(Boolean).join(" · ");
  $("review-state").textContent = insp.review
    ? "Reviewed: " + insp.review.label + " by " + insp.review.operator + " (" + when(insp.review.time) + ")"
    : "Not reviewed yet.";
  await Promise.all([showImages(insp, localFile), showReviews(insp)]);
}

// the bar spans 0 .. twice the threshold (or a little past the score); the mark is the threshold
function showBar(insp) {
  const score = Number(insp.score), threshold = Number(insp.threshold);
  const span = Math.max(2 * threshold, 1.1 * score, 1e-6) || 1;
  $("score-fill").className = insp.verdict || "";
  $("score-fill").style.width = (100 * Math.min(score / span, 1) || 0) + "%";
  $("threshold-mark").style.left = (100 * threshold / span || 0) + "%";
}

// the overlay's colour scale (service/overlay.py vmax_for): full tint at twice the threshold; with a threshold of 0,
// at the map's own maximum
function showLegend(threshold) {
  const t = Number(threshold);
  const scaled = Number.isFinite(t) && t > 0;
  $("legend-mid").textContent = scaled ? "threshold " + fmt(t) : "";
  $("legend-high").textContent = scaled ? fmt(2 * t) + " and above" : "this image's highest heat";
}

async function showImages(insp, localFile) {
  const id = insp.id;
  const [overlay, original] = await Promise.allSettled([
    insp.heatmap_url ? api(insp.heatmap_url) : Promise.reject(new Error("the heatmap is no longer kept")),
    api("/v1/inspections/" + encodeURIComponent(id) + "/image.png"),
  ]);
  if (!current || current.id !== id) return; // another inspection was opened meanwhile
  setImage("overlay", overlay.status === "fulfilled" ? overlay.value : null);
  setImage("original", original.status === "fulfilled" ? original.value : localFile);
  if (overlay.status === "rejected") say("Heatmap: " + overlay.reason.message);
}

async function showReviews(insp) {
  const list = $("review-history");
  list.replaceChildren();
  if (typeof insp.review_count === "number" && insp.review_count < 2) return; // the latest review says it all
  let reviews;
  try {
    reviews = await api("/v1/inspections/" + encodeURIComponent(insp.id) + "/reviews");
  } catch (error) {
    return; // an older service has no review history: the latest review above is all there is
  }
  if (!current || current.id !== insp.id) return;
  const items = Array.isArray(reviews) ? reviews : reviews.items || [];
  if (items.length < 2) return; // one review is already shown as the latest
  for (const r of items) {
    const li = document.createElement("li");
    li.textContent = [dash(r.label), r.defect_class && "(" + r.defect_class + ")", "by " + dash(r.operator),
      when(r.time), r.note && "— " + r.note].filter(Boolean).join(" ");
    list.appendChild(li);
  }
}

async function review(label) {
  if (!current) return;
  const operator = store.getItem("knowngood.operator") || $("operator").value.trim();
  if (!operator) { say("Enter your name at sign-in so the review records who confirmed it."); return; }
  try {
    const updated = await api("/v1/inspections/" + encodeURIComponent(current.id) + "/review", {
      method: "POST", headers: { "Content-Type": "application/json" },
      body: JSON.stringify({ label, operator }),
    });
    say("");
    await show(updated);
    await refresh();
  } catch (error) {
    say("Review not recorded: " + error.message);
  }
}

// ---- enlarged view -----------------------------------------------------------------------------------------

function zoom(which) {
  if (!$(which).getAttribute("src")) return;
  $("zoom-image").src = $(which).src;
  $("zoom-title").textContent = which === "original" ? "Original image" : "Heatmap overlay";
  $("zoom-original").disabled = which === "original";
  $("zoom-overlay").disabled = which === "overlay";
  if (!$("zoom").open) $("zoom").showModal(); // a modal dialog closes on Escape by itself
}

// ---- lists -------------------------------------------------------------------------------------------------

function fillTable(body, items, columns) {
  body.replaceChildren();
  for (const insp of items) {
    const row = document.createElement("tr");
    row.dataset.id = insp.id;
    for (const column of columns) cell(row, column(insp));
    row.addEventListener("click", () => show(insp));
    body.appendChild(row);
  }
}

function isoFrom(localValue) { return localValue ? new Date(localValue).toISOString() : ""; }

function pageSize() { return Number($("f-size").value) || 20; }

function recentQuery() {
  const q = new URLSearchParams();
  const add = (name, value) => { if (value) q.set(name, value); };
  add("part_type", $("f-part-type").value);
  add("station", $("f-station").value.trim());
  add("part_id", $("f-part").value.trim());
  add("verdict", $("f-verdict").value);
  add("reviewed", $("f-reviewed").value);
  add("since", isoFrom($("f-since").value));
  add("until", isoFrom($("f-until").value));
  q.set("limit", String(pageSize()));
  q.set("offset", String(offset));
  return "/v1/inspections?" + q.toString();
}

function showPage(items, total) {
  const known = typeof total === "number";
  $("recent-empty").hidden = items.length > 0;
  $("page-info").textContent = (items.length ? "showing " + (offset + 1) + "–" + (offset + items.length) : "showing 0")
    + " of " + (known ? total : DASH);
  $("page-prev").disabled = offset === 0;
  $("page-next").disabled = known ? offset + items.length >= total : items.length < pageSize();
}

// drift is judged per part type: the banner shows the chosen one's (why: the text when there is none to show)
function showDrift(drift, why = "") {
  const status = drift && drift.status ? drift.status : "unknown";
  $("drift-banner").className = "drift-banner " + status;
  $("drift-badge").className = "drift-badge " + status;
  $("drift-badge").textContent = "drift: " + (drift && drift.status ? drift.status.replace(/_/g, " ") : DASH);
  let text = why || DRIFT_TEXT[status] || "drift state unavailable";
  if (status === "not_enough_images" && !missing(drift.images) && !missing(drift.needed)) {
    text += " (" + drift.images + " of " + drift.needed + ")";
  }
  if (drift && drift.part_type && severalPartTypes()) text = "part type " + drift.part_type + ": " + text;
  $("drift-text").textContent = text;
  $("drift-detail").textContent = drift && drift.detail ? drift.detail : "";
}

function driftOf(name) { return name ? api(partTypePath(name) + "/drift") : Promise.resolve(null); }

async function refreshDrift() {
  const name = partType();
  try {
    showDrift(await driftOf(name), name ? "" : NO_CHOICE);
  } catch (error) {
    showDrift(null);
  }
}

async function refresh() {
  const [types] = await Promise.allSettled([refreshPartTypes()]); // first: the lists below use the choice
  const name = partType();
  const [queue, recent, drift] = await Promise.allSettled([
    api("/v1/inspections?verdict=flag&reviewed=false&limit=100"),
    api(recentQuery()),
    driftOf(name),
  ]);
  const failed = [types, queue, recent, drift].find((r) => r.status === "rejected");
  if (failed && failed.reason.status === 401) {
    say("Signed out: " + failed.reason.message);
    signOut();
    return;
  }
  if (queue.status === "fulfilled") {
    const q = queue.value, count = q.total ?? q.count ?? q.items.length;
    fillTable($("queue-rows"), q.items, [(i) => when(i.time), (i) => i.part_type, (i) => i.part_id,
      (i) => i.station, (i) => fmt(i.score), (i) => fmt(i.threshold), modelLabel]);
    $("queue-count").textContent = String(count);
    $("queue-empty").hidden = count > 0;
  }
  if (recent.status === "fulfilled") {
    fillTable($("recent-rows"), recent.value.items, [(i) => when(i.time), (i) => i.part_type, (i) => i.part_id,
      (i) => i.station, (i) => i.verdict, (i) => fmt(i.score), modelLabel,
      (i) => (i.review ? i.review.label : null)]);
    showPage(recent.value.items, recent.value.total);
  }
  showDrift(drift.status === "fulfilled" ? drift.value : null, name ? "" : NO_CHOICE);
  if (failed) say("Refresh failed: " + failed.reason.message);
  try { await refreshModel(); } catch (error) { /* the header keeps the last model it showed */ }
}

function applyFilters(event) {
  if (event) event.preventDefault();
  offset = 0;
  refresh();
}

function clearFilters() {
  for (const id of ["f-part-type", "f-station", "f-part", "f-verdict", "f-reviewed", "f-since", "f-until"]) {
    $(id).value = "";
  }
  applyFilters();
}

function turnPage(step) {
  offset = Math.max(0, offset + step * pageSize());
  refresh();
}

document.addEventListener("DOMContentLoaded", () => {
  $("login-form").addEventListener("submit", signIn);
  $("inspect-form").addEventListener("submit", inspect);
  $("sign-out").addEventListener("click", signOut);
  $("review-good").addEventListener("click", () => review("good"));
  $("review-defective").addEventListener("click", () => review("defective"));
  $("station").addEventListener("input", () => showKept("station", false));
  $("part-type").addEventListener("change", choosePartType);
  $("original").addEventListener("click", () => zoom("original"));
  $("overlay").addEventListener("click", () => zoom("overlay"));
  $("zoom-original").addEventListener("click", () => zoom("original"));
  $("zoom-overlay").addEventListener("click", () => zoom("overlay"));
  $("zoom-close").addEventListener("click", () => $("zoom").close());
  $("zoom").addEventListener("click", (event) => { if (event.target === $("zoom")) $("zoom").close(); });
  $("filter-form").addEventListener("submit", applyFilters);
  $("f-clear").addEventListener("click", clearFilters);
  $("f-size").addEventListener("change", () => applyFilters());
  $("page-prev").addEventListener("click", () => turnPage(-1));
  $("page-next").addEventListener("click", () => turnPage(1));
  $("operator").value = store.getItem("knowngood.operator") || "";
  if (token()) {
    refreshPartTypes().then(() => { showApp(true); return refresh(); }).catch(() => signOut());
  }
});
