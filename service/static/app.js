// Operator page: plain JavaScript against REST v1. The token lives in sessionStorage (this tab only).
"use strict";

const $ = (id) => document.getElementById(id);
const store = window.sessionStorage;
let current = null; // the inspection shown in the result panel
let overlayUrl = null;
let timer = null;

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

function fmt(x) { return x === null || x === undefined ? "—" : Number(x).toFixed(3); }
function when(t) { return new Date(t).toLocaleString(); }

function cell(row, text) {
  const td = document.createElement("td");
  td.textContent = text === null || text === undefined ? "" : String(text);
  row.appendChild(td);
  return td;
}

async function signIn(event) {
  event.preventDefault();
  store.setItem("knowngood.token", $("token").value.trim());
  store.setItem("knowngood.operator", $("operator").value.trim());
  try {
    await refreshModel();
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
  if (timer) { clearInterval(timer); timer = null; }
  if (on) { timer = setInterval(() => { if ($("watch").checked) refresh(); }, 5000); }
}

async function refreshModel() {
  const m = await api("/v1/model");
  $("model-info").textContent = "model " + m.id + " · threshold " + fmt(m.threshold.value) + " · " + m.runtime;
}

async function inspect(event) {
  event.preventDefault();
  const file = $("file").files[0];
  if (!file) { say("Choose an image first."); return; }
  const form = new FormData();
  form.append("image", file);
  if ($("part-id").value.trim()) form.append("part_id", $("part-id").value.trim());
  if ($("station").value.trim()) form.append("station", $("station").value.trim());
  $("inspect-btn").disabled = true;
  try {
    const result = await api("/v1/inspections", { method: "POST", body: form });
    say("");
    await show(result);
    await refresh();
  } catch (error) {
    say("Not inspected: " + error.message);
  } finally {
    $("inspect-btn").disabled = false;
  }
}

async function show(insp) {
  current = insp;
  $("result").hidden = false;
  $("result-id").textContent = insp.id;
  const verdict = $("verdict");
  verdict.textContent = insp.verdict;
  verdict.className = "verdict " + insp.verdict;
  $("score").textContent = fmt(insp.score);
  $("threshold").textContent = fmt(insp.threshold);
  // the bar spans 0 .. twice the threshold (or a little past the score); the mark is the threshold
  const span = Math.max(2 * insp.threshold, 1.1 * insp.score, 1e-6);
  $("score-fill").className = insp.verdict;
  $("score-fill").style.width = (100 * Math.min(insp.score / span, 1)) + "%";
  $("threshold-mark").style.left = (100 * insp.threshold / span) + "%";
  $("result-meta").textContent = [insp.part_id && "part " + insp.part_id, insp.station && "station " + insp.station,
    when(insp.time), insp.image.width + " × " + insp.image.height + " px"].filter(Boolean).join(" · ");
  $("review-state").textContent = insp.review
    ? "Reviewed: " + insp.review.label + " by " + insp.review.operator + " (" + when(insp.review.time) + ")"
    : "Not reviewed yet.";
  if (overlayUrl) { URL.revokeObjectURL(overlayUrl); overlayUrl = null; }
  $("overlay").removeAttribute("src");
  if (insp.heatmap_url) {
    try {
      overlayUrl = URL.createObjectURL(await api(insp.heatmap_url));
      $("overlay").src = overlayUrl;
    } catch (error) { say("Heatmap: " + error.message); }
  }
}

async function review(label) {
  if (!current) return;
  const operator = store.getItem("knowngood.operator") || $("operator").value.trim();
  if (!operator) { say("Enter your name at sign-in so the review records who confirmed it."); return; }
  try {
    const updated = await api("/v1/inspections/" + current.id + "/review", {
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

async function refresh() {
  try {
    const [queue, recent, drift] = await Promise.all([
      api("/v1/inspections?verdict=flag&reviewed=false&limit=100"),
      api("/v1/inspections?limit=20"),
      api("/v1/drift"),
    ]);
    fillTable($("queue-rows"), queue.items, [(i) => when(i.time), (i) => i.part_id, (i) => i.station,
      (i) => fmt(i.score), (i) => fmt(i.threshold)]);
    $("queue-count").textContent = String(queue.count);
    $("queue-empty").hidden = queue.count > 0;
    fillTable($("recent-rows"), recent.items, [(i) => when(i.time), (i) => i.part_id, (i) => i.station,
      (i) => i.verdict, (i) => fmt(i.score), (i) => (i.review ? i.review.label : "")]);
    $("drift-status").textContent = drift.status.replace(/_/g, " ");
    $("drift-detail").textContent = drift.detail;
    await refreshModel();
  } catch (error) {
    say(error.status === 401 ? "Signed out: " + error.message : "Refresh failed: " + error.message);
    if (error.status === 401) signOut();
  }
}

document.addEventListener("DOMContentLoaded", () => {
  $("login-form").addEventListener("submit", signIn);
  $("inspect-form").addEventListener("submit", inspect);
  $("sign-out").addEventListener("click", signOut);
  $("review-good").addEventListener("click", () => review("good"));
  $("review-defective").addEventListener("click", () => review("defective"));
  $("operator").value = store.getItem("knowngood.operator") || "";
  if (token()) {
    refreshModel().then(() => { showApp(true); return refresh(); }).catch(() => signOut());
  }
});
