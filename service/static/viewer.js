// wxshock viewer: asks the server's own /v1 routes; no library, no CDN, no map tiles.
"use strict";

const INDICATORS = ["prcp_total", "tmean"];
// A spell of our own, so that the picture marks the seasons where a dry and hot spell runs.
const SPELLS = [{
  name: "dry_hot", window: 5,
  when: [{ indicator: "prcp_total", class_max: -1 }, { indicator: "tmean", class_min: 1 }],
}];

const $ = (id) => document.getElementById(id);
const state = { communities: null, datasets: [], plotUrl: null };

function setState(name, message) {
  document.body.dataset.state = name;
  if (message !== undefined) $("status").textContent = message;
}

function headers(extra) {
  const h = Object.assign({}, extra || {});
  const token = $("token").value.trim();
  if (token) h["Authorization"] = "Bearer " + token;
  return h;
}

class Problem extends Error {
  constructor(doc) {
    super(doc.detail || doc.title || "request failed");
    this.doc = doc;
  }
}

async function call(path, options) {
  const response = await fetch(path, Object.assign({}, options, { headers: headers((options || {}).headers) }));
  if (!response.ok) {
    let doc;
    try { doc = await response.json(); } catch (e) { doc = { title: response.statusText, status: response.status }; }
    throw new Problem(doc);
  }
  return response;
}

function showProblem(error) {
  const box = $("problem");
  box.hidden = false;
  box.textContent = "";
  const title = document.createElement("strong");
  const doc = error.doc || { title: "Error", detail: String(error) };
  title.textContent = (doc.title || "Error") + (doc.status ? " (" + doc.status + ")" : "") + ": ";
  box.appendChild(title);
  box.appendChild(document.createTextNode(doc.detail || ""));
  if (doc.pointer) box.appendChild(document.createTextNode(" [at " + doc.pointer + "]"));
  setState("error", "The server refused the request.");
}

function communityId(feature, index) {
  if (feature.id !== undefined && feature.id !== null) return String(feature.id);
  return String(index);
}

function communityLabel(feature, index) {
  const p = feature.properties || {};
  const name = p.name || p.label || "";
  return communityId(feature, index) + (name ? " - " + name : "");
}

// --- outlines: an equirectangular sketch of the communities, scaled to the box --------------------------

function rings(geometry) {
  if (!geometry) return [];
  if (geometry.type === "Polygon") return geometry.coordinates;
  if (geometry.type === "MultiPolygon") return geometry.coordinates.flat();
  return [];
}

function drawOutlines() {
  const svg = $("outlines");
  svg.textContent = "";
  const features = state.communities.features;
  let xmin = Infinity, xmax = -Infinity, ymin = Infinity, ymax = -Infinity;
  const extend = ([x, y]) => { xmin = Math.min(xmin, x); xmax = Math.max(xmax, x); ymin = Math.min(ymin, y); ymax = Math.max(ymax, y); };
  features.forEach((f) => {
    if (f.geometry && f.geometry.type === "Point") extend(f.geometry.coordinates);
    rings(f.geometry).forEach((ring) => ring.forEach(extend));
  });
  if (!isFinite(xmin)) return;
  const squeeze = Math.cos(((ymin + ymax) / 2) * Math.PI / 180) || 1;
  const width = 320, height = 240, pad = 10;
  const scale = Math.min((width - 2 * pad) / (((xmax - xmin) * squeeze) || 1), (height - 2 * pad) / ((ymax - ymin) || 1));
  const px = (x) => pad + (x - xmin) * squeeze * scale;
  const py = (y) => height - pad - (y - ymin) * scale;
  const ns = "http://www.w3.org/2000/svg";
  features.forEach((f, i) => {
    let shape;
    if (f.geometry && f.geometry.type === "Point") {
      shape = document.createElementNS(ns, "circle");
      shape.setAttribute("cx", px(f.geometry.coordinates[0]));
      shape.setAttribute("cy", py(f.geometry.coordinates[1]));
      shape.setAttribute("r", 4);
    } else {
      shape = document.createElementNS(ns, "path");
      const d = rings(f.geometry).map((ring) => "M" + ring.map(([x, y]) => px(x).toFixed(1) + "," + py(y).toFixed(1)).join("L") + "Z").join("");
      shape.setAttribute("d", d);
      shape.setAttribute("fill-rule", "evenodd");
    }
    shape.setAttribute("class", "community");
    shape.dataset.id = communityId(f, i);
    const tip = document.createElementNS(ns, "title");
    tip.textContent = communityLabel(f, i);
    shape.appendChild(tip);
    shape.addEventListener("click", () => { $("community").value = shape.dataset.id; markChosen(); });
    svg.appendChild(shape);
  });
  markChosen();
}

function markChosen() {
  const chosen = $("community").value;
  document.querySelectorAll("#outlines .community").forEach((el) => el.classList.toggle("chosen", el.dataset.id === chosen));
}

// --- datasets and communities -------------------------------------------------------------------------------

async function loadDatasets() {
  const doc = await (await call("/v1/datasets")).json();
  state.datasets = doc.datasets;
  const select = $("dataset");
  select.textContent = "";
  doc.datasets.forEach((d) => select.add(new Option(d.title ? d.name + " - " + d.title : d.name, d.name)));
  await loadDataset();
}

async function loadDataset() {
  const info = state.datasets.find((d) => d.name === $("dataset").value) || state.datasets[0];
  const years = info.years || [];
  if (years.length === 2) {
    $("baseline-start").value = years[0];
    $("baseline-end").value = Math.min(years[0] + 9, years[1]);
    $("baseline-start").min = $("baseline-end").min = years[0];
    $("baseline-start").max = $("baseline-end").max = years[1];
  }
  const response = await call("/viewer/data/communities?dataset=" + encodeURIComponent(info.name));
  state.communities = await response.json();
  const select = $("community");
  select.textContent = "";
  state.communities.features.forEach((f, i) => select.add(new Option(communityLabel(f, i), communityId(f, i))));
  drawOutlines();
  setState("idle", state.communities.features.length + " communities in " + info.name + ". Pick one and press Show.");
}

// --- the request ---------------------------------------------------------------------------------------------

function parseLags(text) {
  const parts = text.split(/[\s,]+/).filter((s) => s.length);
  const lags = parts.map(Number);
  if (!lags.length || lags.some((k) => !Number.isInteger(k) || k < 0)) {
    throw new Problem({ title: "Invalid lags", detail: "lags " + JSON.stringify(text) + " must be whole numbers of seasons, 0 or more, e.g. 0, 1, 2", pointer: "/lags" });
  }
  return [...new Set(lags)].sort((a, b) => a - b);
}

function buildRequest() {
  const id = $("community").value;
  const index = state.communities.features.findIndex((f, i) => communityId(f, i) === id);
  const feature = Object.assign({}, state.communities.features[index]);
  feature.id = id;
  const season = $("season").value;
  return {
    dataset: $("dataset").value,
    features: { type: "FeatureCollection", features: [feature] },
    baseline: { start: Number($("baseline-start").value), end: Number($("baseline-end").value) },
    season: season === "year" ? "year" : { months: season.split(",").map(Number) },
    lags: parseLags($("lags").value),
    indicators: INDICATORS,
    spells: SPELLS,
  };
}

function renderTable(doc) {
  const table = $("table");
  table.textContent = "";
  const head = table.createTHead().insertRow();
  doc.columns.forEach((c) => { const th = document.createElement("th"); th.textContent = c; head.appendChild(th); });
  const body = table.createTBody();
  doc.rows.forEach((row) => {
    const tr = body.insertRow();
    doc.columns.forEach((c) => {
      const td = tr.insertCell();
      const v = row[c];
      if (v === null || v === undefined) { td.textContent = "-"; td.className = "missing"; return; }
      td.textContent = typeof v === "number" && !Number.isInteger(v) ? v.toFixed(2) : String(v);
      if (/_z(_lag\d+)?$/.test(c) && Math.abs(v) >= 1) td.className = v < 0 ? "low" : "high";
    });
  });
}

function renderWarnings(warnings) {
  const box = $("warnings");
  box.hidden = !warnings.length;
  box.querySelector("summary").textContent = warnings.length + " value(s) left empty";
  const list = box.querySelector("ul");
  list.textContent = "";
  warnings.forEach((w) => {
    const item = document.createElement("li");
    const where = [w.indicator, w.year].filter((v) => v !== null && v !== undefined).join(" ");
    item.textContent = (where ? where + ": " : "") + w.reason;
    list.appendChild(item);
  });
}

async function show(event) {
  if (event) event.preventDefault();
  $("problem").hidden = true;
  let body;
  try { body = buildRequest(); } catch (e) { showProblem(e); return; }
  $("show").disabled = true;
  setState("busy", "Computing " + body.features.features[0].id + "...");
  const json = JSON.stringify(body);
  const post = { method: "POST", body: json, headers: { "Content-Type": "application/json" } };
  try {
    const [table, picture] = await Promise.all([
      call("/v1/indicators?format=json", Object.assign({}, post, { headers: { "Content-Type": "application/json", "Accept": "application/json" } })),
      call("/v1/plots/series", Object.assign({}, post, { headers: { "Content-Type": "application/json", "Accept": "image/png" } })),
    ]);
    const doc = await table.json();
    renderTable(doc);
    if (state.plotUrl) URL.revokeObjectURL(state.plotUrl);
    state.plotUrl = URL.createObjectURL(await picture.blob());
    const img = $("series");
    await new Promise((resolve, reject) => { img.onload = resolve; img.onerror = reject; img.src = state.plotUrl; });
    $("figure").hidden = false;
    const p = doc.provenance;
    $("provenance").textContent = "dataset " + p.dataset + ", fingerprint " + p.fingerprint + ", request " + p.request_hash + " (" + p.software + ")";
    renderWarnings(doc.warnings);
    const warned = doc.warnings.length ? " " + doc.warnings.length + " value(s) left empty, for the reasons listed below." : "";
    setState("ready", doc.rows.length + " season-years of " + body.features.features[0].id + "." + warned);
  } catch (e) {
    showProblem(e);
  } finally {
    $("show").disabled = false;
  }
}

async function start() {
  const saved = sessionStorage.getItem("wxshock-token");
  if (saved) $("token").value = saved;
  $("token").addEventListener("change", () => { sessionStorage.setItem("wxshock-token", $("token").value); loadDatasets().catch(showProblem); });
  $("query").addEventListener("submit", show);
  $("dataset").addEventListener("change", () => loadDataset().catch(showProblem));
  $("community").addEventListener("change", markChosen);
  try { await loadDatasets(); } catch (e) { showProblem(e); return; }
  // A link can carry the choice: /?community=qu-005&baseline=1981-1990&lags=0,1&season=5,6,7,8,9,10
  const query = new URLSearchParams(window.location.search);
  if (query.has("community")) {
    $("community").value = query.get("community");
    const span = (query.get("baseline") || "").split("-").map(Number);
    if (span.length === 2 && span.every(Number.isInteger)) { $("baseline-start").value = span[0]; $("baseline-end").value = span[1]; }
    if (query.has("lags")) $("lags").value = query.get("lags");
    if (query.has("season")) $("season").value = query.get("season");
    markChosen();
    await show();
  }
}

start();
