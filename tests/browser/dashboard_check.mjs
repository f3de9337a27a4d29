// Opens the dashboard in Debian's chromium (headless, driven by playwright-core) while two
// simulated robots learn, with every request that would leave the server's origin blocked, and
// checks what a person reads off it:
//   - the charting library is in the page (nothing is fetched from elsewhere);
//   - the axes carry the labels and units of the figures and, on the visited-state map, the
//     spec's state labels and units; the labels are drawn on the canvases (fillText is watched);
//   - hovering a point shows the value /api/robots/ID/history returns for it;
//   - exploration and evaluation series are both drawn once evaluation episodes exist;
//   - the side-by-side view draws a line per robot for two robots;
//   - a zoom the user dragged survives the page's refreshes;
//   - the map shows visited cells and where episodes ended; the page fits a phone's width.
// Saves screenshots.
//
//   node dashboard_check.mjs URL ROBOT_NAME,ROBOT_NAME OUT_DIR
// Prints one JSON line with what it saw; exits 1 when a check fails.
import { chromium } from "playwright-core";
import fs from "node:fs";
import os from "node:os";
import path from "node:path";

const [url, namesArg, outDir] = process.argv.slice(2);
const names = namesArg.split(",");
const origin = new URL(url).origin;
fs.mkdirSync(outDir, { recursive: true });
const profile = fs.mkdtempSync(path.join(os.tmpdir(), "foray-chromium-"));
// A fresh profile directory per run, given as the persistent context's user data dir.
const browser = await chromium.launchPersistentContext(profile, {
  executablePath: "/usr/bin/chromium",
  headless: true,
  args: ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run"],
  viewport: { width: 1280, height: 1000 },
});
const result = { ok: false, blocked: [] };
const check = (ok, what) => { if (!ok) throw new Error(what); };
try {
  // The network is blocked: only the server's own origin answers.
  await browser.route("**/*", route => {
    if (new URL(route.request().url()).origin === origin) return route.continue();
    result.blocked.push(route.request().url());
    return route.abort();
  });
  // Records every text drawn on a canvas (uPlot draws axis labels and tick values there).
  await browser.addInitScript(() => {
    window.drawnText = new Set();
    const fillText = CanvasRenderingContext2D.prototype.fillText;
    CanvasRenderingContext2D.prototype.fillText = function (text, ...rest) {
      window.drawnText.add(String(text));
      return fillText.call(this, text, ...rest);
    };
  });
  const page = await browser.newPage();
  await page.goto(url);
  result.library = await page.evaluate(() => typeof window.uPlot);
  check(result.library === "function", "the charting library is not in the page");
  const panels = names.map(n => page.locator("section.robot", { hasText: n }));
  for (const p of panels) await p.waitFor({ timeout: 30000 });
  await page.screenshot({ path: path.join(outDir, "dashboard-start.png"), fullPage: true });

  // In the page: the robot's JSON, its history, and what a chart of its panel holds.
  const robotJson = name => page.evaluate(async name => {
    const token = new URLSearchParams(location.search).get("token");
    const auth = token ? { headers: { Authorization: "Bearer " + token } } : {};
    const robots = (await (await fetch("/api/robots", auth)).json()).robots;
    const r = robots.find(x => x.name === name);
    const history = await (await fetch(`/api/robots/${r.robot_id}/history`, auth)).json();
    return { robot: r, history };
  }, name);
  const chartState = (panel, key) => panel.locator(`figure[data-chart="${key}"] .plot`).evaluate(el => {
    const u = el.chart;
    return {
      axes: u.axes.map(a => a.label),
      series: u.series.map(s => s.label),
      data: u.data.map(a => Array.from(a)),
      x: [u.scales.x.min, u.scales.x.max],
    };
  });

  // Wait until both robots have evaluation episodes, a model and visited cells.
  const deadline = Date.now() + 150000;
  for (;;) {
    const seen = [];
    for (const n of names) seen.push(await robotJson(n));
    result.progress = seen.map(s => ({ episodes: s.history.episodes.length,
      evaluations: s.history.episodes.filter(e => e.evaluation).length, trainings: s.history.trainings.length }));
    if (result.progress.every(p => p.evaluations >= 1 && p.episodes >= 6 && p.trainings >= 2)) break;
    if (Date.now() > deadline) throw new Error(`the robots did not get evaluation episodes in time: ${JSON.stringify(result.progress)}`);
    await page.waitForTimeout(1000);
  }
  const { robot, history } = await robotJson(names[0]);
  const panel = panels[0];
  // The charts read from a refresh after the history above: they hold at least its episodes.
  const refreshed = Number(await page.evaluate(() => document.body.dataset.refreshes));
  await page.waitForFunction(n => Number(document.body.dataset.refreshes) >= n + 1, refreshed, { timeout: 15000 });

  // Axes: labels and units of each figure, and the spec's dimensions on the map.
  const expected = {
    return: ["episode", "return"], success: ["episode", "success (%)"],
    gain: ["episode", "gain (nats/step)"],
    error: ["model version", "NLL (nats/element)", "MSE (normalised units²)"],
    calibration: ["model version", "inside interval (%)"], latency: ["time", "plan time (ms)", "deadline misses"],
    training: ["model version", "round time (s)", "transitions used"],
  };
  const dim = i => robot.state[robot.coverage.indices[i]];
  expected.map = [0, 1].map(i => dim(i).unit ? `${dim(i).label} (${dim(i).unit})` : dim(i).label);
  result.axes = {};
  for (const [key, labels] of Object.entries(expected)) {
    result.axes[key] = (await chartState(panel, key)).axes;
    check(JSON.stringify(result.axes[key]) === JSON.stringify(labels), `chart ${key}: axes ${result.axes[key]}, expected ${labels}`);
  }
  const drawn = await page.evaluate(() => [...window.drawnText]);
  for (const labels of Object.values(expected)) {
    for (const l of labels) check(drawn.includes(l), `the axis label "${l}" was never drawn`);
  }
  result.mapAxes = expected.map;

  // Hover: the newest exploration episode's point on the return chart.
  const returns = await chartState(panel, "return");
  check(JSON.stringify(returns.series.slice(1)) === '["exploration","evaluation"]', `return series ${returns.series}`);
  const explored = history.episodes.filter(e => !e.evaluation);
  const evaluated = history.episodes.filter(e => e.evaluation);
  const inChart = (e, series) => returns.data[series][returns.data[0].indexOf(e.episode)];
  check(explored.every(e => inChart(e, 1) === e.return && inChart(e, 2) === null),
        "the exploration series is not the history's exploration returns");
  check(evaluated.length >= 1 && evaluated.every(e => inChart(e, 2) === e.return && inChart(e, 1) === null),
        "the evaluation series is not the history's evaluation returns");
  // A point inside the plot, not on its edge (where the axes' own elements lie).
  const target = explored[Math.floor(explored.length / 2)];
  await panel.locator('figure[data-chart="return"]').scrollIntoViewIfNeeded();
  const pos = await panel.locator('figure[data-chart="return"] .plot').evaluate((el, e) => {
    const u = el.chart, box = u.over.getBoundingClientRect();
    const clamp = (v, size) => Math.min(size - 2, Math.max(2, v));
    return { x: box.left + clamp(u.valToPos(e.episode, "x"), box.width),
             y: box.top + clamp(u.valToPos(e.return, "y"), box.height) };
  }, target);
  await page.mouse.move(pos.x - 5, pos.y);
  await page.mouse.move(pos.x, pos.y, { steps: 4 });
  await page.waitForTimeout(200);
  result.hoverAt = { ...pos, under: await page.evaluate(p => document.elementFromPoint(p.x, p.y)?.className, pos),
                     idx: await panel.locator('figure[data-chart="return"] .plot').evaluate(el => el.chart.cursor.idx) };
  const legend = panel.locator('figure[data-chart="return"] .u-legend');
  const shown = await legend.locator("tr.u-series").evaluateAll(rows => rows.map(r => r.querySelector(".u-value")?.textContent));
  result.hover = { episode: target.episode, return: target.return, shown };
  check(Number(shown[0]) === target.episode, `hover shows episode ${shown[0]}, expected ${target.episode}`);
  check(Math.abs(Number(shown[1]) - target.return) <= 1e-5 * Math.max(1, Math.abs(target.return)),
        `hover shows return ${shown[1]}, history says ${target.return}`);
  const success = await chartState(panel, "success");
  check(success.data[2].some(v => v !== null) && success.data[1].some(v => v !== null), "success rates are not drawn for both kinds");

  // The side-by-side view: a line per robot.
  for (const key of ["return", "success", "gain", "nll"]) {
    const c = await page.locator(`#compare figure[data-chart="compare-${key}"] .plot`).evaluate(el => ({
      series: el.chart.series.slice(1).map(s => s.label), filled: el.chart.data.slice(1).map(a => a.some(v => v !== null)) }));
    result[`compare_${key}`] = c;
    check(names.every(n => c.series.includes(n)) && c.series.length === names.length, `side by side ${key}: ${c.series}`);
    if (key !== "success") check(c.filled.every(Boolean), `side by side ${key}: a robot's line is empty`);
  }

  // The map: visited cells, and where episodes ended.
  const map = panel.locator('figure[data-chart="map"]');
  result.map = { occupied: Number(await map.getAttribute("data-occupied")), lost: Number(await map.getAttribute("data-lost")),
                 goals: Number(await map.getAttribute("data-goals")) };
  check(result.map.occupied > 0, "the map shows no visited cell");
  // The robots keep learning while the page is read: the map comes from a refresh after the
  // history above and before the one fetched now, so its episode ends lie between the two.
  const endsOf = h => h.episodes.filter(e => e.terminal || e.success).length;
  const later = (await robotJson(names[0])).history;
  const shownEnds = result.map.lost + result.map.goals;
  check(shownEnds >= endsOf(history) && shownEnds <= endsOf(later),
        `the map shows ${shownEnds} episode ends, history has ${endsOf(history)} before and ${endsOf(later)} after`);
  await page.screenshot({ path: path.join(outDir, "dashboard-later.png"), fullPage: true });

  // Zoom by dragging across the return chart; it must survive two refreshes.
  const box = await panel.locator('figure[data-chart="return"] .u-over').boundingBox();
  await page.mouse.move(box.x + box.width * 0.2, box.y + box.height / 2);
  await page.mouse.down();
  await page.mouse.move(box.x + box.width * 0.6, box.y + box.height / 2, { steps: 8 });
  await page.mouse.up();
  const zoomed = (await chartState(panel, "return")).x;
  const refreshes = Number(await page.evaluate(() => document.body.dataset.refreshes));
  await page.waitForFunction(n => Number(document.body.dataset.refreshes) >= n + 2, refreshes, { timeout: 15000 });
  const after = (await chartState(panel, "return")).x;
  result.zoom = { zoomed, after };
  check(zoomed[0] > returns.x[0] || zoomed[1] < returns.x[1], "dragging did not zoom");
  check(after[0] === zoomed[0] && after[1] === zoomed[1], "a refresh lost the zoom");

  // The overview links to a page of the robot's own.
  await page.locator("table.robots a", { hasText: names[0] }).click();
  await page.waitForURL(/[?&]robot=/);
  await panel.waitFor({ timeout: 10000 });
  result.ownPagePanels = await page.locator("section.robot").count();
  check(result.ownPagePanels === 1, `the robot's page shows ${result.ownPagePanels} robots`);
  await page.setViewportSize({ width: 390, height: 844 });
  await page.waitForTimeout(500);
  result.phoneOverflow = await page.evaluate(() => document.documentElement.scrollWidth - window.innerWidth);
  await page.screenshot({ path: path.join(outDir, "dashboard-phone.png"), fullPage: true });
  check(result.phoneOverflow <= 0, `the page is ${result.phoneOverflow}px wider than a phone`);
  check(result.blocked.length === 0, `the page asked for ${result.blocked}`);
  result.ok = true;
} catch (e) {
  result.error = String(e);
} finally {
  await browser.close();
  fs.rmSync(profile, { recursive: true, force: true });
}
console.log(JSON.stringify(result));
process.exit(result.ok ? 0 : 1);
