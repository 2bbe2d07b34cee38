// Drives the explorer page (GET /) in headless Chromium as a person would: enters a portfolio, computes, and
// checks that what the page shows equals what the API answers for the same request, that the chart shades the
// tail, that the toggles redraw it, and that an API error is shown beside its field. Saves screenshots.
// Run through run.sh, which starts the service and sets BASE_URL and OUT_DIR.
import { chromium } from "playwright-core";
import { mkdtempSync, rmSync } from "node:fs";
import { tmpdir } from "node:os";
import { join } from "node:path";
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

async function api(path, body) {
  const res = await fetch(base + path, { method: "POST", headers: { "content-type": "application/json" }, body: JSON.stringify(body) });
  return { status: res.status, body: await res.json() };
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
  try {
    await fn();
    passed++;
    console.log(`ok - ${name}`);
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
  await page.getByRole("button", { name: "Compute" }).click();
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
    await page.getByRole("button", { name: "Compute" }).click();
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
    await page.getByRole("button", { name: "Compute" }).click();
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
    await page.getByRole("button", { name: "Compute" }).click();
    await page.waitForSelector(".group .g-prob[aria-invalid=true]");
    assert.match(await page.locator(".group .g-prob + .err, .group .err").last().textContent(), /probability in \[0, 1\]/);
    await page.screenshot({ path: join(outDir, "explorer-error.png"), fullPage: false });
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
