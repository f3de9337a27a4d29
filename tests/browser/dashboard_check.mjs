// Opens the dashboard in Debian's chromium (headless, driven by playwright-core) while a
// simulated robot learns, and checks what a person would: the robot appears, its plots get new
// points, the coverage map fills in, and the page fits a phone's width. Saves screenshots.
//
//   node dashboard_check.mjs URL ROBOT_NAME OUT_DIR
// Prints one JSON line with what it saw; exits 1 when a check fails.
import { chromium } from "playwright-core";
import fs from "node:fs";
import os from "node:os";
import path from "node:path";

const [url, robotName, outDir] = process.argv.slice(2);
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
const result = { ok: false };
try {
  const page = await browser.newPage();
  await page.goto(url);
  const card = page.locator("section.robot", { hasText: robotName });
  await card.waitFor({ timeout: 30000 });
  const read = async () => ({
    returns: Number(await card.locator("svg.return").getAttribute("data-points") ?? 0),
    gains: Number(await card.locator("svg.gain").getAttribute("data-points") ?? 0),
    trainings: Number(await card.locator("svg.nll").getAttribute("data-points") ?? 0),
    occupied: Number(await card.locator("canvas.coverage").getAttribute("data-occupied") ?? 0),
  });
  result.first = await read();
  await page.screenshot({ path: path.join(outDir, "dashboard-start.png"), fullPage: true });
  const deadline = Date.now() + 90000;
  for (;;) {
    result.last = await read();
    if (result.last.returns >= result.first.returns + 2 && result.last.trainings > result.first.trainings &&
        result.last.occupied > result.first.occupied) break;
    if (Date.now() > deadline) throw new Error("the plots did not grow within 90 s");
    await page.waitForTimeout(1000);
  }
  await page.screenshot({ path: path.join(outDir, "dashboard-later.png"), fullPage: true });
  // The overview lists the robot and links to a page of its own.
  await page.locator("nav a", { hasText: robotName }).click();
  await page.waitForURL(/[?&]robot=/);
  await card.waitFor({ timeout: 10000 });
  result.ownPageCards = await page.locator("section.robot").count();
  if (result.ownPageCards !== 1) throw new Error(`the robot's page shows ${result.ownPageCards} robots`);
  await page.setViewportSize({ width: 390, height: 844 });
  await page.waitForTimeout(300);
  result.phoneOverflow = await page.evaluate(() => document.documentElement.scrollWidth - window.innerWidth);
  await page.screenshot({ path: path.join(outDir, "dashboard-phone.png"), fullPage: true });
  if (result.phoneOverflow > 0) throw new Error(`the page is ${result.phoneOverflow}px wider than a phone`);
  result.ok = true;
} catch (e) {
  result.error = String(e);
} finally {
  await browser.close();
  fs.rmSync(profile, { recursive: true, force: true });
}
console.log(JSON.stringify(result));
process.exit(result.ok ? 0 : 1);
