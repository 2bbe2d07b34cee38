// Drives the explorer page (GET /) in headless Chromium as a person would: enters a portfolio, computes, and
// checks that what the page shows equals what the API answers for the same request, that the chart shades the
// tail, that the toggles redraw it, and that an API error is shown beside its field; then the tail drivers,
// the layers, the distribution as a CSV download, a stress and the common factor (against the API's answers
// and its base), and CSV and Arrow tables picked from a file with their columns. Saves screenshots.
// Run through run.sh, which starts the service and sets BASE_URL and OUT_DIR.
import { chromium } from "playwright-core";
import { mkdtempSync, readFileSync, rmSync } from "node:fs";
import { tmpdir } from "node:os";
import { basename, dirname, join } from "node:path";
import { fileURLToPath } from "node:url";
import assert from "node:assert/strict";

const base = process.env.BASE_URL;
const outDir = process.env.OUT_DIR || ".";
assert.ok(base, "BASE_URL is required");

const METHODS = ["exact", "normal", "edgeworth", "poisson", "saddlepoint", "auto"];
// An invented book: 30 delivery vans with their own yearly breakdown probabilities (entered as CSV with a
// header line), 300 hand trolleys at 1% each, and road closures as a Poisson source.
const VANS = [0.12, 0.05, 0.08, 0.21, 0.03, 0.09, 0.14, 0.06, 0.11, 0.04, 0.17, 0.07, 0.02, 0.1, 0.13,
  0.05, 0.09, 0.26, 0.06, 0.08, 0.04, 0.15, 0.07, 0.11, 0.03, 0.19, 0.05, 0.12, 0.08, 0.06];
const CSV = "probability\n" + VANS.slice(0, 20).join("\n") + "\n" + VANS.slice(20).join(", ") + "\n";
const PORTFOLIO = { probabilities: VANS, groups: [{ size: 300, probability: 0.01 }], poisson_rates: [1.5] };
const K = 14;
const FIXTURES = join(dirname(fileURLToPath(import.meta.url)), "fixtures");
// The table fixture: an invented bike-share scheme's docking stations with their yearly chance of a power outage.
const STATIONS_CSV = join(FIXTURES, "stations.csv"), STATIONS_ARROW = join(FIXTURES, "stations.arrow");
const TABLE = { probability: "p_outage", id: "station" };
const STRESS = { odds_factor: 2 };
const FACTOR = { model: "one_factor_gaussian", rho: 0.15 };
const LAYERS = [{ attachment: 10, limit: 5 }, { attachment: 12, limit: 4 }, { attachment: 16 }];

async function api(path, body) {
  const res = await fetch(base + path, { method: "POST", headers: { "content-type": "application/json" }, body: JSON.stringify(body) });
  return { status: res.status, body: await res.json() };
}

/** The same question as multipart/form-data with a table file, as the page sends it. */
async function apiTable(path, body, file, type, accept) {
  const fd = new FormData();
  fd.append("request", new Blob([JSON.stringify(body)], { type: "application/json" }));
  fd.append("exposures", new Blob([readFileSync(file)], { type }), basename(file));
  const res = await fetch(base + path, { method: "POST", body: fd, headers: accept ? { accept } : {} });
  return { status: res.status, body: accept ? await res.text() : await res.json() };
}

/** A number as printed (6 significant digits) is the API's number to that precision. */
function near(text, v, what) {
  const shown = Number(text);
  assert.ok(Number.isFinite(shown), `${what}: shown ${text}`);
  assert.ok(Math.abs(shown - v) <= 5e-6 * Math.abs(v), `${what}: shown ${text}, API ${v}`);
}

const profile = mkdtempSync(join(tmpdir(), "tailtally-e2e-"));
const context = await chromium.launchPersistentContext(profile, {
  executablePath: "/usr/bin/chromium",
  headless: true,
  args: ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync"],
  viewport: { width: 1280, height: 800 },
  acceptDownloads: true,
});
let passed = 0, failed = 0;
async function check(name, fn) {
  const t0 = Date.now();
  try {
    await fn();
    passed++;
    console.log(`ok - ${name} (${((Date.now() - t0) / 1000).toFixed(1)} s)`);
  } catch (e) {
    failed++;
    console.log(`not ok - ${name}\n  ${String(e.stack || e).split("\n").join("\n  ")}`);
  }
}

try {
  const page = context.pages()[0] || await context.newPage();
  page.setDefaultTimeout(60000);
  const foreign = [], pageErrors = [];
  page.on("request", (r) => { const u = r.url(); if (!u.startsWith(base) && !u.startsWith("data:") && !u.startsWith("blob:")) foreign.push(u); });
  page.on("pageerror", (e) => pageErrors.push(String(e)));
  // A 4xx answer is logged by the browser as a failed resource; the page handles those, so only other errors count.
  page.on("console", (m) => { if (m.type() === "error" && !/^Failed to load resource: the server responded with a status of 4\d\d/.test(m.text())) pageErrors.push(m.text()); });

  await page.goto(base + "/");

  await check("the page states the assumptions and the caution", async () => {
    const text = await page.locator("#assumptions").innerText();
    assert.match(text, /independent/);
    assert.match(text, /qualified actuary or engineer/);
  });

  // Enter the portfolio as a person would: type the CSV, replace the example group, set the rate and k.
  await page.getByRole("button", { name: "Clear" }).click();
  await page.getByLabel("Event probabilities, one per line or comma-separated").fill(CSV);
  await page.getByRole("button", { name: "Add a group" }).click();
  await page.locator(".group .g-size").fill("300");
  await page.locator(".group .g-prob").fill("0.01");
  await page.getByLabel("Rates, comma-separated").fill("1.5");
  await page.getByLabel("Threshold k (a count of events)").fill(String(K));
  await page.getByRole("radio", { name: "P(S ≥ k)" }).check();
  await page.getByRole("button", { name: "Compute", exact: true }).click();
  await page.waitForFunction(() => document.querySelector("#chart svg") && document.querySelectorAll("#quantiles tbody tr").length > 0);

  const want = await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "upper", methods: METHODS });
  assert.equal(want.status, 200);

  await check("every method's numbers shown equal the API's answer", async () => {
    const rows = await page.$$eval("#estimates tbody tr", (trs) => trs.map((tr) => ({
      method: tr.dataset.method,
      cells: Array.from(tr.querySelectorAll("td")).map((td) => ({ raw: td.dataset.raw, text: td.textContent })),
    })));
    assert.deepEqual(rows.map((r) => r.method), METHODS);
    for (const [i, e] of want.body.results[0].estimates.entries()) {
      const row = rows[i];
      const [, prob, err, rel, kind, lo, hi] = row.cells;
      assert.equal(prob.raw, JSON.stringify(e.probability), `${e.method} probability`);
      assert.equal(err.raw, JSON.stringify(e.error_bound), `${e.method} error bound`);
      assert.equal(rel.raw, e.relative_error_bound === null ? "" : JSON.stringify(e.relative_error_bound));
      assert.equal(kind.text, e.bound_kind);
      assert.equal(lo.raw, JSON.stringify(e.interval[0]));
      assert.equal(hi.raw, JSON.stringify(e.interval[1]));
      // The text shown is the same number to its printed precision.
      const shown = Number(prob.text);
      assert.ok(Math.abs(shown - e.probability) <= 5e-6 * e.probability, `${e.method}: shown ${prob.text}, API ${e.probability}`);
    }
  });

  await check("the summary shown equals the API's", async () => {
    const dds = await page.$$eval("#summary dd", (d) => d.map((x) => [x.dataset.key, x.dataset.raw]));
    const s = want.body.summary;
    const byKey = Object.fromEntries(dds);
    assert.equal(byKey["exposures"], JSON.stringify(s.exposures));
    assert.equal(byKey["mean"], JSON.stringify(s.mean));
    assert.equal(byKey["standard deviation"], JSON.stringify(s.standard_deviation));
    assert.equal(byKey["support to"], "null", "a Poisson part makes the support unbounded");
  });

  await check("the chart shades the tail and marks the threshold", async () => {
    const info = await page.$eval("#chart svg", (svg) => ({
      region: Number(svg.querySelector(".tail-region")?.getAttribute("width") || 0),
      tailBars: svg.querySelectorAll(".tail-bars rect").length,
      bars: svg.querySelectorAll(".bars rect").length,
      overlays: Array.from(svg.querySelectorAll(".overlay")).map((p) => p.getAttribute("class")),
      threshold: svg.querySelector(".threshold text")?.textContent,
      xLabel: svg.querySelector(".x-label")?.textContent,
    }));
    assert.ok(info.region > 20, `tail region width ${info.region}`);
    assert.ok(info.tailBars >= 3 && info.bars >= 10, JSON.stringify(info));
    assert.deepEqual(info.overlays, ["overlay overlay-normal", "overlay overlay-poisson", "overlay overlay-saddlepoint"]);
    assert.equal(info.threshold, `k = ${K}`);
    assert.equal(info.xLabel, "number of events k");
  });

  await check("the bars are the API's point probabilities", async () => {
    const titles = await page.$$eval("#chart svg .tail-bars rect title", (t) => t.map((x) => x.textContent));
    const first = titles[0].match(/P\(S = (\d+)\) = (.*)/);
    assert.equal(Number(first[1]), K);
    const p = await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "point" });
    const v = p.body.results[0].estimates[0].probability;
    assert.ok(Math.abs(Number(first[2]) - v) <= 5e-4 * v, `${first[2]} vs ${v}`);
  });

  await check("the overlay and log-scale toggles redraw the chart", async () => {
    await page.getByRole("checkbox", { name: "normal" }).uncheck();
    assert.equal(await page.locator("#chart svg .overlay-normal").count(), 0);
    await page.getByRole("checkbox", { name: "log scale" }).check();
    assert.equal(await page.locator("#chart svg .y-label").textContent(), "P(S = k), log scale");
    assert.ok(await page.locator("#chart svg .tail-bars rect").count() >= 3);
    await page.getByRole("checkbox", { name: "normal" }).check();
    await page.getByRole("checkbox", { name: "log scale" }).uncheck();
    assert.equal(await page.locator("#chart svg .overlay-normal").count(), 1);
  });

  await check("the quantiles shown are the smallest counts whose cdf reaches each level", async () => {
    const rows = await page.$$eval("#quantiles tbody tr", (trs) => trs.map((tr) => ({
      level: Number(tr.dataset.level), cells: Array.from(tr.querySelectorAll("td")).map((td) => td.dataset.raw) })));
    assert.deepEqual(rows.map((r) => r.level), [0.95, 0.99, 0.995]);
    for (const r of rows) {
      const count = Number(r.cells[1]);
      const cdf = await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [count - 1, count], side: "lower" });
      const [below, at] = cdf.body.results.map((x) => x.estimates[0].probability);
      assert.ok(below < r.level && at >= r.level, `level ${r.level}: P(S<=${count - 1}) = ${below}, P(S<=${count}) = ${at}`);
      assert.ok(Math.abs(Number(r.cells[2]) - at) <= 1e-12, `cdf at count ${r.cells[2]} vs ${at}`);
    }
  });

  await page.screenshot({ path: join(outDir, "explorer.png"), fullPage: true });

  await check("a far tail below 1e-308 still shows, from its logarithm", async () => {
    await page.getByLabel("Threshold k (a count of events)").fill("400");
    await page.getByRole("radio", { name: "P(S = k)" }).check();
    await page.getByRole("button", { name: "Compute", exact: true }).click();
    await page.waitForFunction(() => /P\(S = 400\)/.test(document.querySelector("#status").textContent));
    const exact = await page.$eval('#estimates tr[data-method="exact"] td:nth-child(2)', (td) => td.textContent);
    const r = await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [400], side: "point" });
    const ln = r.body.results[0].estimates[0].ln_probability;
    assert.equal(r.body.results[0].estimates[0].probability, 0);
    const [m, e] = exact.split("e").map(Number);
    assert.ok(e < -308 && Math.abs(Math.log(m) + e * Math.LN10 - ln) < 1e-4 * Math.abs(ln), `${exact} vs ln ${ln}`);
    await page.getByRole("checkbox", { name: "log scale" }).check();
    assert.ok(await page.locator("#chart svg .tail-bars rect").count() === 1);
    await page.screenshot({ path: join(outDir, "explorer-far-tail.png"), fullPage: false });
    await page.getByRole("checkbox", { name: "log scale" }).uncheck();
  });

  await check("an invalid entry gets the API's message beside its field", async () => {
    const bad = "0.2\nabc\n1.5";
    await page.getByLabel("Event probabilities, one per line or comma-separated").fill(bad);
    await page.getByLabel("Threshold k (a count of events)").fill(String(K));
    await page.getByRole("button", { name: "Compute", exact: true }).click();
    await page.waitForSelector("#probs[aria-invalid=true]");
    const msg = await page.locator("#probs-err").textContent();
    const r = await api("/v1/tail", { portfolio: { ...PORTFOLIO, probabilities: [0.2, "abc", 1.5] }, thresholds: [K], side: "upper", methods: METHODS });
    assert.equal(r.status, 422);
    const byPtr = Object.fromEntries(r.body.errors.map((e) => [e.pointer, e.detail]));
    assert.ok(msg.includes(`entry 2 (line 2): ${byPtr["/portfolio/probabilities/1"]}`), msg);
    if (byPtr["/portfolio/probabilities/2"]) assert.ok(msg.includes(`entry 3 (line 3): ${byPtr["/portfolio/probabilities/2"]}`), msg);
    assert.equal(await page.evaluate(() => document.activeElement.id), "probs", "focus moves to the field at fault");
    assert.equal(await page.locator(".results.stale").count(), 1, "earlier results are marked as stale");
    await page.locator(".group .g-prob").fill("2");
    await page.getByLabel("Event probabilities, one per line or comma-separated").fill("0.2");
    await page.getByRole("button", { name: "Compute", exact: true }).click();
    await page.waitForSelector(".group .g-prob[aria-invalid=true]");
    assert.match(await page.locator(".group .g-prob + .err, .group .err").last().textContent(), /probability in \[0, 1\]/);
    await page.screenshot({ path: join(outDir, "explorer-error.png"), fullPage: false });
  });


  // ---------- every question, the scenario and the tables ----------
  const rowsOf = (sel) => page.$$eval(sel, (trs) => trs.map((tr) =>
    Array.from(tr.querySelectorAll("td")).map((td) => ({ raw: td.dataset.raw, text: td.textContent }))));
  async function compute() {
    await page.getByRole("button", { name: "Compute", exact: true }).click();
    await page.waitForFunction(() => !document.body.hasAttribute("aria-busy") && document.querySelector("#chart svg"));
  }
  async function enterPortfolio() {
    await page.getByRole("button", { name: "Clear" }).click();
    await page.getByLabel("Event probabilities, one per line or comma-separated").fill(CSV);
    await page.getByRole("button", { name: "Add a group" }).click();
    await page.locator(".group .g-size").fill("300");
    await page.locator(".group .g-prob").fill("0.01");
    await page.getByLabel("Rates, comma-separated").fill("1.5");
    await page.getByLabel("Threshold k (a count of events)").fill(String(K));
    await page.getByRole("radio", { name: "P(S ≥ k)" }).check();
  }
  function checkEstimates(rows, want, baseWant) {
    for (const [i, e] of want.results[0].estimates.entries()) {
      const cells = rows[i];
      assert.equal(cells[1].raw, JSON.stringify(e.probability), `${e.method} probability`);
      assert.equal(cells[4].text, e.bound_kind, `${e.method} bound kind`);
      near(cells[1].text, e.probability, `${e.method}`);
      if (baseWant) {
        assert.equal(cells[7].raw, JSON.stringify(baseWant.results[0].estimates[i].probability), `${e.method} without stress`);
        near(cells[7].text, baseWant.results[0].estimates[i].probability, `${e.method} without stress`);
      } else assert.equal(cells[7].raw, "", `${e.method}: no base without a stress`);
    }
  }
  const shownModel = async () => JSON.parse(await page.locator("#model").getAttribute("data-model"));

  await enterPortfolio();
  await compute();
  const indep = (await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "upper", methods: METHODS })).body;

  await check("the assumptions show code as code, without backticks", async () => {
    const text = await page.locator("#assumptions").innerText();
    assert.ok(!text.includes("`"), text);
    assert.deepEqual(await page.$$eval("#assumptions code", (c) => c.map((x) => x.textContent)), ["model"]);
    assert.equal(await page.locator("#chart-h").textContent(), "Number of events: how likely each count is");
    assert.match(await page.locator("#model").textContent(), /exposures are independent; no stress/);
  });

  await check("the tail drivers shown are /v1/contributions' top N", async () => {
    await page.getByLabel("show the top").fill("8");
    await page.getByLabel("ranked by").selectOption("impact");
    await page.getByRole("button", { name: "Rank again" }).click();
    await page.waitForFunction(() => document.querySelectorAll("#drivers tbody tr").length === 8);
    const want = (await api("/v1/contributions", { portfolio: PORTFOLIO, threshold: K, top: 8, rank_by: "impact" })).body;
    const rows = await rowsOf("#drivers tbody tr");
    assert.equal(rows.length, want.contributions.length);
    for (const [i, c] of want.contributions.entries()) {
      const [rank, id, index, prob, sens, impact, without, kind] = rows[i];
      assert.equal(rank.text, String(i + 1));
      assert.equal(id.raw, "", "typed entries have no ids");
      assert.equal(index.raw, JSON.stringify(c.index));
      assert.equal(prob.raw, JSON.stringify(c.probability));
      assert.equal(sens.raw, JSON.stringify(c.sensitivity));
      assert.equal(impact.raw, JSON.stringify(c.impact));
      assert.equal(without.raw, JSON.stringify(c.tail_without));
      assert.equal(kind.text, c.detail.sensitivity.bound_kind);
      near(prob.text, c.probability, `driver ${i} probability`);
      near(sens.text, c.sensitivity, `driver ${i} sensitivity`);
      near(impact.text, c.impact, `driver ${i} impact`);
    }
    assert.equal(await page.locator("#drv-tail").getAttribute("data-raw"), JSON.stringify(want.tail_probability.value));
  });

  await check("the layers shown are /v1/layers' answers", async () => {
    const first = page.locator(".layer").first();
    await first.locator(".l-att").fill("10");
    await first.locator(".l-limit").fill("5");
    await page.getByRole("button", { name: "Update the layers" }).click();
    await page.waitForFunction(() => document.querySelector("#layers tbody tr td")?.dataset.raw === "10");
    const want = (await api("/v1/layers", { portfolio: PORTFOLIO, layers: LAYERS })).body;
    const rows = await rowsOf("#layers tbody tr.layer-row");
    assert.equal(rows.length, 3);
    for (const [i, l] of want.layers.entries()) {
      const [att, lim, exp, touched, exhausted, kind] = rows[i];
      assert.equal(att.raw, JSON.stringify(l.attachment));
      assert.equal(lim.raw, l.limit === undefined || l.limit === null ? "" : JSON.stringify(l.limit));
      assert.equal(exp.raw, JSON.stringify(l.expected_count));
      assert.equal(touched.raw, JSON.stringify(l.probability_touched));
      assert.equal(exhausted.raw, JSON.stringify(l.probability_exhausted));
      assert.equal(kind.text, l.detail.expected_count.bound_kind);
      near(exp.text, l.expected_count, `layer ${i} expected count`);
      near(touched.text, l.probability_touched, `layer ${i} touched`);
      if (l.probability_exhausted > 0) near(exhausted.text, l.probability_exhausted, `layer ${i} exhausted`);
    }
    assert.equal(rows[2][1].text, "no limit");
    assert.equal(await page.locator("#layers tr.base-row").count(), 0, "no base rows without a stress");
  });

  await check("the distribution downloads as the API's CSV", async () => {
    const [dl] = await Promise.all([page.waitForEvent("download"),
      page.getByRole("button", { name: "Download the distribution (CSV)" }).click()]);
    assert.equal(dl.suggestedFilename(), "tailtally-distribution.csv");
    const got = readFileSync(await dl.path(), "utf8");
    const res = await fetch(base + "/v1/distribution", { method: "POST", headers: { "content-type": "application/json", accept: "text/csv" },
      body: JSON.stringify({ portfolio: PORTFOLIO }) });
    assert.match(res.headers.get("content-type"), /^text\/csv/);
    assert.equal(got, await res.text());
    assert.match(got, /^count,pmf,cdf,sf,ln_pmf,ln_cdf,ln_sf,pmf_error_bound$/m);
    assert.match(got, /^# /);
  });

  await check("under a stress every figure is the API's stressed answer, and the base is shown beside it", async () => {
    await page.getByLabel("Stress the probabilities").selectOption("odds_factor");
    await page.getByLabel("Stress factor").fill("2");
    await compute();
    await page.waitForFunction(() => document.querySelectorAll("#layers tr.base-row").length === 3);
    const want = (await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "upper", methods: METHODS, stress: STRESS })).body;
    checkEstimates(await rowsOf("#estimates tbody tr"), want, want.base);
    // The base is the unstressed answer, and the stress moves every estimate.
    for (const [i, e] of want.base.results[0].estimates.entries()) {
      assert.equal(e.probability, indep.results[0].estimates[i].probability, `${e.method} base is the unstressed answer`);
      assert.ok(want.results[0].estimates[i].probability > e.probability, `${e.method}: the stress raises the tail`);
    }
    assert.deepEqual(await shownModel(), want.model);
    assert.deepEqual(want.model.stress, STRESS);
    assert.match(await page.locator("#model").textContent(), /odds are multiplied by 2/);
    const q = (await api("/v1/quantiles", { portfolio: PORTFOLIO, levels: [0.95, 0.99, 0.995], stress: STRESS })).body;
    const qr = await rowsOf("#quantiles tbody tr");
    q.quantiles.forEach((x, i) => {
      assert.equal(qr[i][1].raw, JSON.stringify(x.count));
      assert.equal(qr[i][5].raw, JSON.stringify(q.base.quantiles[i].count));
    });
    const lay = (await api("/v1/layers", { portfolio: PORTFOLIO, layers: LAYERS, stress: STRESS })).body;
    const lr = await rowsOf("#layers tbody tr.layer-row"), br = await rowsOf("#layers tbody tr.base-row");
    lay.layers.forEach((l, i) => {
      assert.equal(lr[i][2].raw, JSON.stringify(l.expected_count));
      assert.equal(br[i][1].raw, JSON.stringify(lay.base.layers[i].expected_count));
      assert.ok(l.expected_count > lay.base.layers[i].expected_count);
    });
    const drv = (await api("/v1/contributions", { portfolio: PORTFOLIO, threshold: K, top: 8, rank_by: "impact", stress: STRESS })).body;
    assert.equal(await page.locator("#drv-tail").getAttribute("data-raw"), JSON.stringify(drv.tail_probability.value));
    assert.match(await page.locator("#drv-tail").textContent(), /without stress/);
    const [dl] = await Promise.all([page.waitForEvent("download"),
      page.getByRole("button", { name: "Download the distribution (CSV)" }).click()]);
    const res = await fetch(base + "/v1/distribution", { method: "POST", headers: { "content-type": "application/json", accept: "text/csv" },
      body: JSON.stringify({ portfolio: PORTFOLIO, stress: STRESS }) });
    assert.equal(readFileSync(await dl.path(), "utf8"), await res.text(), "the CSV follows the stress");
    assert.equal(await page.locator("#save-svg").isDisabled(), true, "the SVG route has no stress");
    await page.screenshot({ path: join(outDir, "explorer-stress.png"), fullPage: true });
  });

  await check("under the common factor every figure is the API's, and differs from the independent one", async () => {
    await page.getByLabel("Stress the probabilities").selectOption("");
    await page.getByLabel("Exposures share a common cause (one-factor Gaussian model)").check();
    await page.getByLabel("Correlation rho with the common cause, in [0, 1)").fill("0.15");
    await compute();
    const want = (await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "upper", methods: METHODS, dependence: FACTOR })).body;
    assert.equal(want.base, undefined);
    checkEstimates(await rowsOf("#estimates tbody tr"), want, null);
    for (const [i, e] of want.results[0].estimates.entries()) {
      assert.notEqual(e.probability, indep.results[0].estimates[i].probability, `${e.method} moves with the factor`);
    }
    assert.ok(want.results[0].estimates[0].probability > indep.results[0].estimates[0].probability, "a common cause fattens the tail");
    assert.deepEqual(await shownModel(), want.model);
    assert.equal(want.model.dependence.model, "one_factor_gaussian");
    assert.match(await page.locator("#model").textContent(), /rho = 0\.15; [\d,]+ conditional laws evaluated/);
    const q = (await api("/v1/quantiles", { portfolio: PORTFOLIO, levels: [0.95, 0.99, 0.995], dependence: FACTOR })).body;
    const qr = await rowsOf("#quantiles tbody tr");
    q.quantiles.forEach((x, i) => { assert.equal(qr[i][1].raw, JSON.stringify(x.count)); assert.equal(qr[i][4].text, x.bound_kind); });
    const lay = (await api("/v1/layers", { portfolio: PORTFOLIO, layers: LAYERS, dependence: FACTOR })).body;
    const lr = await rowsOf("#layers tbody tr.layer-row");
    lay.layers.forEach((l, i) => assert.equal(lr[i][2].raw, JSON.stringify(l.expected_count)));
    const drv = (await api("/v1/contributions", { portfolio: PORTFOLIO, threshold: K, top: 8, rank_by: "impact", dependence: FACTOR })).body;
    const dr = await rowsOf("#drivers tbody tr");
    drv.contributions.forEach((c, i) => { assert.equal(dr[i][2].raw, JSON.stringify(c.index)); assert.equal(dr[i][4].raw, JSON.stringify(c.sensitivity)); });
    await page.screenshot({ path: join(outDir, "explorer-factor.png"), fullPage: true });
  });

  await check("stress and factor together: the API's answer and its base", async () => {
    await page.getByLabel("Stress the probabilities").selectOption("probability_factor");
    await page.getByLabel("Stress factor").fill("1.25");
    await compute();
    const stress = { probability_factor: 1.25 };
    const want = (await api("/v1/tail", { portfolio: PORTFOLIO, thresholds: [K], side: "upper", methods: METHODS, stress, dependence: FACTOR })).body;
    checkEstimates(await rowsOf("#estimates tbody tr"), want, want.base);
    assert.deepEqual(await shownModel(), want.model);
    assert.match(await page.locator("#model").textContent(), /multiplied by 1\.25 \(capped at 1\)/);
    await page.getByLabel("Stress the probabilities").selectOption("");
    await page.getByLabel("Exposures share a common cause (one-factor Gaussian model)").uncheck();
  });

  const stationsWant = async (file, type) => {
    const tail = await apiTable("/v1/tail", { portfolio: {}, thresholds: [6], side: "upper", methods: METHODS, table: TABLE }, file, type);
    const drv = await apiTable("/v1/contributions", { portfolio: {}, threshold: 6, top: 8, rank_by: "impact", table: TABLE }, file, type);
    assert.equal(tail.status, 200, JSON.stringify(tail.body));
    assert.equal(drv.status, 200, JSON.stringify(drv.body));
    return { tail: tail.body, drv: drv.body };
  };
  async function checkStations(want) {
    checkEstimates(await rowsOf("#estimates tbody tr"), want.tail, null);
    const rows = await rowsOf("#drivers tbody tr");
    assert.equal(rows.length, 8);
    want.drv.contributions.forEach((c, i) => {
      assert.equal(rows[i][1].raw, JSON.stringify(c.id), `driver ${i} id`);
      assert.equal(rows[i][1].text, c.id);
      assert.match(c.id, /^DS-\d+$/);
      assert.equal(rows[i][2].raw, JSON.stringify(c.index));
      assert.equal(rows[i][5].raw, JSON.stringify(c.impact));
      near(rows[i][5].text, c.impact, `driver ${c.id} impact`);
    });
  }

  let fromCsv = null;
  await check("a CSV table with a column picker: the page sends it as multipart and shows the API's answer with ids", async () => {
    await page.getByRole("button", { name: "Clear" }).click();
    await page.locator("#file").setInputFiles(STATIONS_CSV);
    await page.waitForSelector("#table-box:not([hidden]) select#col-prob");
    const cols = await page.$$eval("#col-prob option", (o) => o.map((x) => x.value));
    assert.deepEqual(cols, ["station", "district", "docks", "p_outage"]);
    assert.deepEqual(await page.$$eval("#col-id option", (o) => o.map((x) => x.value)), ["", ...cols]);
    assert.match(await page.locator("#table-name").textContent(), /stations\.csv \(40 rows, 4 columns/);
    await page.getByLabel("probability column").selectOption("p_outage");
    await page.getByLabel("id column").selectOption("station");
    await page.getByLabel("Threshold k (a count of events)").fill("6");
    await compute();
    fromCsv = await stationsWant(STATIONS_CSV, "text/csv");
    await checkStations(fromCsv);
    await page.screenshot({ path: join(outDir, "explorer-table.png"), fullPage: true });
  });

  await check("an Arrow stream: the columns are read from its schema, and the answer is the CSV's", async () => {
    await page.locator("#file").setInputFiles(STATIONS_ARROW);
    await page.waitForFunction(() => /Arrow stream/.test(document.querySelector("#table-name").textContent));
    const opts = await page.$$eval("#col-prob option", (o) => o.map((x) => [x.value, x.textContent]));
    assert.deepEqual(opts.map((o) => o[0]), ["station", "district", "docks", "p_outage"]);
    assert.match(opts[3][1], /floating point/);
    assert.equal(await page.locator("#col-prob").inputValue(), "p_outage", "the float column is picked");
    await page.getByLabel("id column").selectOption("station");
    await compute();
    const want = await stationsWant(STATIONS_ARROW, "application/vnd.apache.arrow.stream");
    assert.deepEqual(want.drv.contributions, fromCsv.drv.contributions);
    await checkStations(want);
    await page.getByRole("button", { name: "Stop using this file" }).click();
    assert.equal(await page.locator("#table-box").isHidden(), true);
  });

  await check("a bad column name gets the API's message beside the file", async () => {
    await page.locator("#file").setInputFiles(STATIONS_CSV);
    await page.waitForSelector("#table-box:not([hidden]) select#col-prob");
    await page.getByLabel("probability column").selectOption("district");
    await page.getByLabel("id column").selectOption("station");
    await page.getByRole("button", { name: "Compute", exact: true }).click();
    await page.waitForSelector("#file[aria-invalid=true]");
    const want = await apiTable("/v1/tail", { portfolio: {}, thresholds: [6], side: "upper", methods: METHODS, table: { probability: "district", id: "station" } }, STATIONS_CSV, "text/csv");
    assert.equal(want.status, 422);
    const msg = await page.locator("#table-err").textContent();
    assert.match(want.body.errors[0].detail, /id "DS-101"\), column district: "riverside" is not a number/);
    assert.ok(msg.startsWith(want.body.errors.map((e) => e.detail).join(" ")), msg);
    await page.getByRole("button", { name: "Stop using this file" }).click();
  });

  await check("typed names are the exposures' ids among the drivers (portfolio.ids)", async () => {
    await page.getByRole("button", { name: "Clear" }).click();
    await page.getByLabel("Event probabilities, one per line or comma-separated").fill("tram-7, 0.3\nferry-2 0.45\n0.2, 0.1\nbus-11;0.25");
    await page.getByLabel("Threshold k (a count of events)").fill("2");
    await compute();
    const portfolio = { probabilities: [0.3, 0.45, 0.2, 0.1, 0.25], ids: ["tram-7", "ferry-2", null, null, "bus-11"] };
    const want = (await api("/v1/contributions", { portfolio, threshold: 2, top: 8, rank_by: "impact" })).body;
    const rows = await rowsOf("#drivers tbody tr");
    assert.equal(rows.length, 5);
    want.contributions.forEach((c, i) => {
      assert.equal(rows[i][1].raw, c.id === undefined || c.id === null ? "" : JSON.stringify(c.id), `driver ${i} id`);
      assert.equal(rows[i][2].raw, JSON.stringify(c.index));
      assert.equal(rows[i][5].raw, JSON.stringify(c.impact));
    });
    assert.deepEqual(want.contributions.map((c) => c.id ?? null).filter((x) => x).sort(), ["bus-11", "ferry-2", "tram-7"]);
  });

  await check("a sampled chart says which counts it shows in words (3rd, not 3th)", async () => {
    await page.getByRole("button", { name: "Clear" }).click();
    await page.getByRole("button", { name: "Add a group" }).click();
    await page.locator(".group .g-size").fill("100000");
    await page.locator(".group .g-prob").fill("0.05");
    await page.getByLabel("Threshold k (a count of events)").fill("5200");
    await compute();
    const note = await page.locator("#chart-note").textContent();
    const m = note.match(/Every (\d+)(st|nd|rd|th) count is plotted/);
    assert.ok(m, note);
    const n = Number(m[1]);
    const want = n % 100 >= 11 && n % 100 <= 13 ? "th" : ["th", "st", "nd", "rd"][n % 10] || "th";
    assert.equal(m[2], want, note);
    assert.equal(n, 3, "mean 5000, sd 68.9: 827 counts over 300 points");
  });

  await check("keyboard: Tab reaches the form fields in order and focus is visible", async () => {
    await page.goto(base + "/");
    const order = [];
    for (let i = 0; i < 6; i++) {
      await page.keyboard.press("Tab");
      order.push(await page.evaluate(() => document.activeElement.id || document.activeElement.className));
    }
    assert.equal(order[0], "probs");
    assert.equal(order[1], "file");
    const outline = await page.evaluate(() => getComputedStyle(document.activeElement).outlineStyle);
    assert.notEqual(outline, "none");
    // Enter in a field submits the form.
    await page.locator("#threshold").focus();
    await page.keyboard.press("Enter");
    await page.waitForFunction(() => document.querySelector("#chart svg"));
  });

  await check("on a narrow screen the layout stacks and nothing overflows sideways", async () => {
    await page.setViewportSize({ width: 390, height: 844 });
    await page.waitForTimeout(300);
    const overflow = await page.evaluate(() => document.documentElement.scrollWidth - document.documentElement.clientWidth);
    assert.ok(overflow <= 1, `horizontal overflow ${overflow}px`);
    await page.screenshot({ path: join(outDir, "explorer-narrow.png"), fullPage: true });
    await page.setViewportSize({ width: 1280, height: 800 });
  });

  await check("the page loaded nothing from elsewhere and raised no script error", async () => {
    assert.deepEqual(foreign, []);
    assert.deepEqual(pageErrors, []);
  });
} finally {
  await context.close();
  rmSync(profile, { recursive: true, force: true });
}
console.log(`${passed} passed, ${failed} failed`);
process.exit(failed === 0 && passed > 0 ? 0 : 1);
