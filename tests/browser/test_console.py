#!/usr/bin/python3
# The console page (server/console/, served at / by `credence serve`), end to
# end in headless Chromium driven through chromium-driver with Debian's
# python3-selenium. Run by ctest (console_in_browser, label "browser") and by hand:
#   /usr/bin/python3 tests/browser/test_console.py BUILD_DIR
# It fits the demo shop with its catalogue (small rank, fixed seed), serves
# it on a free loopback port and, in the browser:
#   - the model at a glance shows the demo's customer and product counts, the
#     worst convergence quantity and the held-out calibration;
#   - customer c-00042's list has one row per product asked for, each with
#     an interval bar and the catalogue's name for its id, in the order the
#     API gives;
#   - switching the order to the lower bound refetches and changes the order,
#     and choosing a category narrows the list to that category;
#   - two ratings in the visitor panel change the visitor's list to the
#     API's fold-in answer for those two ratings;
#   - the product explorer's scatter has a point per product and a product's
#     neighbours can be listed;
#   - nothing is logged to the browser console and no request leaves loopback;
#   - on a phone-sized screen nothing is wider than the screen;
#   - with API tokens required, the page asks for one and then works.
# Screenshots (desktop and phone) go to BUILD_DIR/test-artifacts/. Skips with
# a NOTICE only when Chromium is not installed. About a minute.
import csv
import http.client
import json
import os
import shutil
import subprocess
import sys
import time
import urllib.parse
from pathlib import Path

CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"
CUSTOMER = "c-00042"       # a customer of the demo shop (cli/demo_shop.cpp)
WAIT_S = 30                # the longest any single page update may take
TOKEN = "console-test-token-0123456789abcdefghij"  # at least 32 characters (server/access.hpp)


def fail(message):
    sys.exit(f"FAIL: {message}")


def run(cmd, log):
    with open(log, "w") as out:
        code = subprocess.call([str(c) for c in cmd], stdout=out, stderr=subprocess.STDOUT, timeout=600)
    if code != 0:
        fail(f"{' '.join(map(str, cmd))} exited {code}:\n{Path(log).read_text()}")


class Server:
    """`credence serve` on a free loopback port (port 0: the program picks;
    its first stdout line names the port)."""

    def __init__(self, binary, config, log):
        self.log = log
        self.proc = subprocess.Popen([str(binary), "serve", "--config", str(config)],
                                     stdout=subprocess.PIPE, stderr=open(log, "w"), text=True)
        line = self.proc.stdout.readline()
        if "listening on http://127.0.0.1:" not in line:
            self.stop()
            fail(f"the server did not start (first line {line!r}):\n{Path(log).read_text()}")
        self.port = int(line.rsplit(":", 1)[1].strip().split("/")[0])
        self.base = f"http://127.0.0.1:{self.port}"
        # The model loads after the socket is bound; /v1/ready says when.
        deadline = time.monotonic() + WAIT_S
        while self.api("GET", "/v1/ready")[0] != 200:
            if time.monotonic() > deadline or self.proc.poll() is not None:
                self.stop()
                fail(f"the server did not become ready:\n{Path(log).read_text()}")
            time.sleep(0.1)

    def api(self, method, path, body=None, token=None):
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=30)
        headers = {"Content-Type": "application/json"} if body is not None else {}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        conn.request(method, path, body=None if body is None else json.dumps(body), headers=headers)
        res = conn.getresponse()
        data = res.read()
        conn.close()
        return res.status, dict(res.getheaders()), data

    def json(self, method, path, body=None, token=None):
        status, _, data = self.api(method, path, body, token)
        if status != 200:
            fail(f"{method} {path} answered {status}: {data[:400]!r}")
        return json.loads(data)

    def stop(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()


def write_config(path, model, extra=""):
    path.write_text(f'[serve]\nmodel = "{model}"\nhost = "127.0.0.1"\nport = 0\nthreads = 4\n{extra}')


def browser(webdriver, Options, Service):
    options = Options()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--no-first-run", "--no-default-browser-check", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--disable-extensions",
                 "--disable-default-apps", "--window-size=1280,1000", "--lang=en-GB"):
        options.add_argument(flag)
    # Every console message and every network event of the page.
    options.set_capability("goog:loggingPrefs", {"browser": "ALL", "performance": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(WAIT_S)
    return driver


def wait_for(what, predicate, timeout_s=WAIT_S):
    deadline = time.monotonic() + timeout_s
    last = None
    while time.monotonic() < deadline:
        try:
            last = predicate()
            if last:
                return last
        except Exception as e:  # an element replaced while read: try again
            last = e
        time.sleep(0.1)
    fail(f"timed out after {timeout_s} s waiting for {what} (last: {last!r})")


def list_items(driver, list_id):
    """The product ids of a recommendation list, in page order."""
    return driver.execute_script(
        "return [...document.querySelectorAll(arguments[0] + ' li.rec')]"
        ".map(li => (li.querySelector('.rec-id') || li.querySelector('.rec-name')).textContent);",
        f"#{list_id}")


def screenshot(driver, path, width, height, mobile):
    """A full-page picture at a `width` x `height` viewport (CSS pixels)."""
    driver.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                           {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": mobile})
    time.sleep(0.3)
    full = driver.execute_script("return document.documentElement.scrollHeight;")
    driver.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                           {"width": width, "height": full, "deviceScaleFactor": 1, "mobile": mobile})
    time.sleep(0.3)
    driver.save_screenshot(str(path))
    driver.execute_cdp_cmd("Emulation.setDeviceMetricsOverride",
                           {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": mobile})


def check_customer_panel(driver, server, names, categories):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys
    from selenium.webdriver.support.ui import Select

    n = int(Select(driver.find_element(By.ID, "customer-n")).first_selected_option.text)
    box = driver.find_element(By.ID, "customer-id")
    box.send_keys(CUSTOMER + Keys.ENTER)  # the keyboard submits the form
    wait_for(f"{n} rows in the customer's list", lambda: len(list_items(driver, "customer-list")) == n)
    by_mean = list_items(driver, "customer-list")
    expected = [e["item"] for e in server.json(
        "GET", f"/v1/users/{CUSTOMER}/recommendations?n={n}&rank_by=mean&level=0.9")["items"]]
    if by_mean != expected:
        fail(f"the page lists {by_mean}, the API {expected}")
    rows = driver.find_elements(By.CSS_SELECTOR, "#customer-list li.rec")
    for row, item in zip(rows, by_mean):
        name = row.find_element(By.CSS_SELECTOR, ".rec-name").text
        if name != names[item]:
            fail(f"row for {item} shows name {name!r}, the catalogue says {names[item]!r}")
        band = row.find_element(By.CSS_SELECTOR, "svg.interval-bar rect.interval")
        if band.size["width"] <= 0 or row.find_elements(By.CSS_SELECTOR, "svg.interval-bar circle.mean") == []:
            fail(f"row for {item} has no interval band or mean dot")
        if "interval" not in row.find_element(By.CSS_SELECTOR, ".rec-figures").text:
            fail(f"row for {item} does not print its interval")

    # A switch refetches: the order by lower bound is the API's, and differs.
    Select(driver.find_element(By.ID, "customer-rank-by")).select_by_value("lower")
    lower_answer = server.json("GET", f"/v1/users/{CUSTOMER}/recommendations?n={n}&rank_by=lower&level=0.9")["items"]
    by_lower = [e["item"] for e in lower_answer]
    if by_lower == by_mean:
        fail("the demo customer's top list is the same by mean and by lower bound; pick another switch")
    wait_for("the order by lower bound", lambda: list_items(driver, "customer-list") == by_lower)
    rows = driver.find_elements(By.CSS_SELECTOR, "#customer-list li.rec")
    if len(driver.find_elements(By.CSS_SELECTOR, "#customer-list svg.interval-bar .rank-mark")) != n:
        fail("ranking by the lower bound does not mark the number used on every row")
    for row, entry in zip(rows, lower_answer):
        used = entry["rank_value"]
        figures = row.find_element(By.CSS_SELECTOR, ".rec-figures").text
        if f"ranked on {used:.2f}" not in figures:
            fail(f"row for {entry['item']} does not print the number it was ranked on ({used:.2f}): {figures!r}")
        why = row.find_element(By.CSS_SELECTOR, ".why").text
        if f"{entry['why']['rating_count']:,} rating" not in why:
            fail(f"row for {entry['item']} does not say how many ratings back it: {why!r}")
        for near in entry["why"]["similar_rated"]:
            if f"{near['name']} (similarity {near['similarity']:.2f})" not in why:
                fail(f"row for {entry['item']} does not name {near['name']} in its why line: {why!r}")
    if not any(e["why"]["similar_rated"] for e in lower_answer):
        fail("no row of the demo customer's list names a similar rated product; the why check proves little")

    # A category narrows the list to that category's products.
    Select(driver.find_element(By.ID, "customer-category")).select_by_visible_text("candles")
    in_category = [e["item"] for e in server.json(
        "GET", f"/v1/users/{CUSTOMER}/recommendations?n={n}&rank_by=lower&level=0.9&category=candles")["items"]]
    if not in_category or any(categories[item] != "candles" for item in in_category):
        fail(f"the API's candles list holds other products: {in_category}")
    wait_for("the list narrowed to candles", lambda: list_items(driver, "customer-list") == in_category)
    return by_mean, by_lower


def check_visitor_panel(driver, server, by_mean):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select

    wait_for("the visitor's first list", lambda: len(list_items(driver, "visitor-list")) > 0)
    before = list_items(driver, "visitor-list")
    product, stars = Select(driver.find_element(By.ID, "visitor-product")), Select(driver.find_element(By.ID, "visitor-stars"))
    # Two products from the demo customer's list, one loved, one disliked.
    ratings = [{"item": by_mean[0], "rating": 5}, {"item": by_mean[1], "rating": 1}]
    for r in ratings:
        product.select_by_value(r["item"])
        stars.select_by_value(str(r["rating"]))
        driver.find_element(By.ID, "visitor-add").click()
    wait_for("two ratings listed", lambda: len(driver.find_elements(By.CSS_SELECTOR, "#visitor-rated li")) == 2)
    n = len(before)
    expected = [e["item"] for e in server.json(
        "POST", "/v1/recommendations", {"ratings": ratings, "n": n, "rank_by": "mean", "level": 0.9})["items"]]
    if expected == before:
        fail("two ratings do not change the fold-in list; pick other products")
    wait_for("the visitor's list after two ratings", lambda: list_items(driver, "visitor-list") == expected)
    return before, expected


def check_products_panel(driver, server, products):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import Select

    points = driver.find_elements(By.CSS_SELECTOR, "#scatter circle.point")
    if len(points) != products:
        fail(f"the scatter has {len(points)} points for {products} products")
    # One tab stop; the arrow keys walk the points.
    from selenium.webdriver.common.keys import Keys
    stops = [p for p in points if p.get_attribute("tabindex") == "0"]
    if len(stops) != 1:
        fail(f"the scatter has {len(stops)} tab stops, not one")
    driver.execute_script("arguments[0].focus();", stops[0])
    first = driver.find_element(By.ID, "scatter-caption").text
    driver.switch_to.active_element.send_keys(Keys.ARROW_RIGHT)
    second = driver.find_element(By.ID, "scatter-caption").text
    if ": sd " not in first or first == second:
        fail(f"focus and the arrow keys do not name the products (captions {first!r}, {second!r})")
    Select(driver.find_element(By.ID, "product-order")).select_by_value("popularity")
    top = server.json("GET", "/v1/items?order=popularity&n=1")["items"][0]
    wait_for("the most rated product first",
             lambda: driver.find_element(By.CSS_SELECTOR, "#product-table tbody tr th").text.startswith(top.get("name", top["item"])))
    driver.find_element(By.CSS_SELECTOR, "#product-table tbody tr button").click()
    wait_for("a product's neighbours", lambda: len(driver.find_elements(By.CSS_SELECTOR, "#similar li")) > 0)


def check_quiet_and_local(driver, port):
    """No console message at all, and every request the page made went to
    the server on loopback (Chrome's network log and the page's own
    resource timing entries)."""
    messages = driver.get_log("browser")
    if messages:
        fail("the browser console logged:\n" + "\n".join(f"{m['level']}: {m['message']}" for m in messages))
    urls = []
    for entry in driver.get_log("performance"):
        event = json.loads(entry["message"])["message"]
        if event.get("method") == "Network.requestWillBeSent":
            urls.append(event["params"]["request"]["url"])
    urls += driver.execute_script("return performance.getEntries().map(e => e.name).filter(n => n.includes(':'));")
    if not urls:
        fail("the network log is empty; the check would prove nothing")
    for url in urls:
        parts = urllib.parse.urlsplit(url)
        if parts.scheme in ("data", "about", "blob"):
            continue
        if parts.hostname != "127.0.0.1" or parts.port != port:
            fail(f"the page made a request off the server: {url}")
    return len(urls)


def check_token_prompt(webdriver, Options, Service, binary, work, model):
    """With read_auth = "required", the page asks for a token, sends it, and
    fills in the model figures; the page itself needs no token."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    tokens = work / "api-tokens"
    tokens.write_text(f"console read,customers {TOKEN}\n")
    config = work / "credence-tokens.toml"
    write_config(config, model, f'read_auth = "required"\napi_tokens_file = "{tokens}"\n')
    server = Server(binary, config, work / "server-tokens.log")
    driver = browser(webdriver, Options, Service)
    try:
        status, _, _ = server.api("GET", "/v1/model")
        if status != 401:
            fail(f"GET /v1/model without a token answered {status}, not 401")
        driver.get(server.base + "/")
        form = driver.find_element(By.ID, "token-form")
        wait_for("the token form", form.is_displayed)
        driver.find_element(By.ID, "token-input").send_keys(TOKEN + Keys.ENTER)
        wait_for("the page to load with the token",
                 lambda: driver.execute_script("return document.body.dataset.ready === 'true';"))
        facts = driver.find_element(By.ID, "glance-facts").text
        if "1,500" not in facts:
            fail(f"with the token the model figures do not show: {facts!r}")
    finally:
        driver.quit()
        server.stop()


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: test_console.py BUILD_DIR")
    build = Path(sys.argv[1]).resolve()
    if not Path(CHROMIUM).exists():
        print(f"NOTICE: {CHROMIUM} not found; the console browser test is skipped "
              "(scripts/setup.sh installs chromium, chromium-driver and python3-selenium)")
        return
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.options import Options
        from selenium.webdriver.chrome.service import Service
        from selenium.webdriver.common.by import By
    except ImportError:
        fail("python3-selenium is missing (scripts/setup.sh installs it); run with Debian's /usr/bin/python3")
    if not Path(CHROMEDRIVER).exists():
        fail(f"{CHROMEDRIVER} is missing (scripts/setup.sh installs chromium-driver)")

    binary = build / "credence"
    work = build / "test-scratch" / "console-browser"
    artifacts = build / "test-artifacts"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    artifacts.mkdir(parents=True, exist_ok=True)

    # The demo shop, fitted small and seeded so every run sees the same model.
    run([binary, "demo-data", "--out-dir", work], work / "demo-data.log")
    model = work / "shop.posterior"
    run([binary, "fit", "--ratings", work / "ratings.csv", "--catalogue", work / "catalogue.csv", "--scale", "1:5",
         "--out", model, "--rank", 4, "--holdout", 0.1, "--seed", 7, "--quiet"], work / "fit.log")
    with open(work / "catalogue.csv", newline="") as f:
        rows = list(csv.reader(f))
    names = {row[0]: row[1] for row in rows[1:]}
    categories = {row[0]: row[2] for row in rows[1:]}

    config = work / "credence.toml"
    write_config(config, model)
    server = Server(binary, config, work / "server.log")
    driver = None
    try:
        summary = server.json("GET", "/v1/model")
        customers = summary["data"]["customers"]
        products = summary["data"]["products"]
        driver = browser(webdriver, Options, Service)
        driver.get(server.base + "/")
        wait_for("the page to load", lambda: driver.execute_script("return document.body.dataset.ready === 'true';"))
        facts = driver.find_element(By.ID, "glance-facts").text
        if f"{customers:,}" not in facts or f"{products:,}" not in facts:
            fail(f"the model at a glance does not show {customers} customers and {products} products: {facts!r}")
        verdict = driver.find_element(By.ID, "glance-verdict").text
        worst = summary["convergence"]["worst"][0]
        if worst["quantity"] not in verdict or f"R-hat {worst['r_hat']:.3f}" not in verdict:
            fail(f"the verdict does not name the worst quantity {worst}: {verdict!r}")
        held = driver.find_element(By.ID, "glance-heldout").text
        share = summary["validation"]["coverage"]["0.9"]
        if f"90% intervals caught {round(share * 1000) / 10:g}%" not in held:
            fail(f"the held-out calibration does not show 90% intervals holding {share}: {held!r}")

        by_mean, by_lower = check_customer_panel(driver, server, names, categories)
        before, after = check_visitor_panel(driver, server, by_mean)
        check_products_panel(driver, server, products)
        requests = check_quiet_and_local(driver, server.port)

        screenshot(driver, artifacts / "console-desktop.png", 1280, 900, False)
        screenshot(driver, artifacts / "console-phone.png", 390, 844, True)
        overflow = driver.execute_script("return document.documentElement.scrollWidth;")
        if overflow > 390:
            fail(f"on a 390 px wide screen the page is {overflow} px wide")
        driver.quit()
        driver = None
        server.stop()
        check_token_prompt(webdriver, Options, Service, binary, work, model)
    finally:
        if driver is not None:
            driver.quit()
        server.stop()
    print(f"console: {len(by_mean)} rows for {CUSTOMER}; by lower bound {by_lower[:3]}... instead of {by_mean[:3]}...; "
          f"visitor list {before[:3]}... became {after[:3]}... after two ratings; {requests} requests, all to loopback; "
          f"screenshots in {artifacts}/console-desktop.png and console-phone.png")


if __name__ == "__main__":
    main()
