#!/usr/bin/env python3
"""Log in to a running lineside in a real browser (Debian's Chromium through selenium) and
print what a person's browser saw, as JSON, for tests/it/access.rs to check.

Usage: browser_login.py BASE_URL ADMIN_TOKEN SCREENSHOT_DIR

Steps: the login page with a wrong token (the page must say why), then the right one (the
browser must land on `next`), then what the page's own scripts can and cannot do: read the
cookie (HttpOnly: they must not), read GET /session (they may), change state without and with
the CSRF token.
"""
import json
import sys

from selenium import webdriver
from selenium.webdriver.chrome.service import Service
from selenium.webdriver.common.by import By
from selenium.webdriver.support import expected_conditions
from selenium.webdriver.support.ui import WebDriverWait


def submit(driver):
    """Click the form's button and wait (up to 30 s) until the browser has left the page
    (the old button goes stale): reading the next page before that races the navigation."""
    button = driver.find_element(By.CSS_SELECTOR, "button[type=submit]")
    button.click()
    WebDriverWait(driver, 30).until(expected_conditions.staleness_of(button))
    WebDriverWait(driver, 30).until(lambda d: d.execute_script("return document.readyState") == "complete")


def main():
    base, token, shots = sys.argv[1], sys.argv[2], sys.argv[3]
    options = webdriver.ChromeOptions()
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--window-size=900,700"):
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=options)
    driver.set_page_load_timeout(30)
    driver.set_script_timeout(30)
    seen = {}
    try:
        driver.get(f"{base}/login?next=/models")
        seen["form_title"] = driver.title
        driver.save_screenshot(f"{shots}/login.png")
        driver.find_element(By.ID, "token").send_keys("not-the-token-0000000")
        submit(driver)
        seen["after_wrong"] = driver.find_element(By.TAG_NAME, "main").text
        driver.save_screenshot(f"{shots}/login-wrong.png")
        driver.find_element(By.ID, "token").send_keys(token)
        submit(driver)
        seen["landed_on"] = driver.current_url
        seen["script_sees_cookie"] = driver.execute_script("return document.cookie")
        fetch = """
            const [method, csrf, done] = arguments;
            const headers = csrf ? {"X-CSRF-Token": csrf} : {};
            fetch("/session", {method, headers}).then(async r => done({status: r.status, body: await r.text()}));
        """
        session = driver.execute_async_script(fetch, "GET", None)
        seen["get_session"] = session
        csrf = json.loads(session["body"]).get("csrf_token")
        seen["delete_without_csrf"] = driver.execute_async_script(fetch, "DELETE", None)["status"]
        driver.get(f"{base}/login")
        seen["login_page_when_logged_in"] = driver.find_element(By.TAG_NAME, "main").text
        driver.save_screenshot(f"{shots}/login-done.png")
        # The login page allows no script connections (its Content-Security-Policy): go
        # back to a page of the server that does, as a page of the later review screens would.
        driver.get(f"{base}/models")
        seen["delete_with_csrf"] = driver.execute_async_script(fetch, "DELETE", csrf)["status"]
        seen["after_logout"] = driver.execute_async_script(fetch, "GET", None)["status"]
    finally:
        driver.quit()
    print(json.dumps(seen))


if __name__ == "__main__":
    main()
