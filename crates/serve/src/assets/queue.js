// The one-by-one page of tagweave's review page: keys, and decisions sent one request
// each with the page kept in place. Without this file the page works by its forms and
// links. Everything put into the page comes either from the server's own fragment (its
// text escaped there) or through textContent and value, never as markup built here.
"use strict";

(function () {
  const slot = document.getElementById("one-slot");
  if (!slot) {
    return;
  }
  const status = document.getElementById("one-status");
  let marked = 0;
  let busy = false;

  const part = () => slot.querySelector("section.one");
  // The threshold box of the shown picture, if it has one.
  const aboveBox = () => {
    const one = part();
    return one && one.querySelector("input[name=above]");
  };
  const suggestions = () => Array.from(slot.querySelectorAll("li.suggestion"));
  const say = (text) => {
    if (status) {
      status.textContent = text;
    }
  };

  // Marks one suggestion (the one a and r act on).
  function mark() {
    const list = suggestions();
    marked = Math.max(0, Math.min(marked, list.length - 1));
    list.forEach((li, i) => li.classList.toggle("marked", i === marked));
  }

  // How the accept-all threshold reads, in hundredths (as the server counts).
  function threshold() {
    const input = aboveBox();
    if (!input) {
      return null;
    }
    const value = parseFloat(input.value);
    if (!Number.isFinite(value)) {
      return null;
    }
    const calibrated = part().dataset.calibrated === "1";
    const scaled = calibrated ? value : value * 100;
    return Math.max(0, Math.min(100, Math.round(scaled)));
  }

  function label(count, above, calibrated) {
    const tags = count === 1 ? "tag" : "tags";
    if (calibrated) {
      return "accept " + count + " " + tags + " at or above " + above + " %";
    }
    return "accept " + count + " " + tags + " scoring " + (above / 100).toFixed(2) + " or more";
  }

  // Shows how many suggestions accept-all would take, and puts exactly those in its form.
  function recount() {
    const one = part();
    const form = one && one.querySelector("form.all-above");
    const above = threshold();
    if (!form || above === null) {
      return;
    }
    const taken = suggestions()
      .filter((li) => Number(li.dataset.hundredths) >= above)
      .map((li) => li.dataset.tag);
    form.querySelectorAll("input[name=add]").forEach((input) => input.remove());
    for (const tag of taken) {
      const input = document.createElement("input");
      input.type = "hidden";
      input.name = "add";
      input.value = tag;
      form.append(input);
    }
    const button = form.querySelector("button");
    button.textContent = label(taken.length, above, one.dataset.calibrated === "1");
    button.disabled = taken.length === 0;
  }

  // Puts the server's fragment (escaped there) in place of the shown picture.
  function place(text) {
    const holder = document.createElement("template");
    holder.innerHTML = text;
    const fresh = holder.content.querySelector("section.one");
    if (!fresh) {
      throw new Error("the answer was not a picture of this page");
    }
    slot.replaceChildren(fresh);
    mark();
  }

  // The words of a refusal page, as plain text.
  function problem(text, code) {
    const page = new DOMParser().parseFromString(text, "text/html");
    const title = page.querySelector("main h1");
    const words = page.querySelector("main p");
    return (
      (title ? title.textContent + ": " : "") + (words ? words.textContent : "answer " + code)
    );
  }

  // One request at a time: on success `done` gets the answer's text; a refusal's words
  // or the failure are said instead.
  async function exchange(address, options, done, failing) {
    if (busy) {
      return;
    }
    busy = true;
    try {
      const answer = await fetch(address, { credentials: "same-origin", ...options });
      const text = await answer.text();
      if (answer.ok) {
        done(text);
      } else {
        say(problem(text, answer.status));
      }
    } catch (error) {
      say(failing + error.message);
    } finally {
      busy = false;
    }
  }

  // One decision, one request: the form as the browser would send it, asking for the
  // picture's fragment back.
  function send(form, button) {
    const body = new URLSearchParams(new FormData(form, button));
    body.append("answer", "part");
    const above = aboveBox();
    if (above) {
      body.append("above", above.value);
    }
    const tag = form.dataset.tag;
    const said = tag
      ? form.dataset.action + "ed: " + tag
      : "accepted " + body.getAll("add").join(", ");
    const options = { method: "POST", body, redirect: "error" };
    exchange(form.action, options, (text) => {
      place(text);
      recount();
      say(said);
    }, "Not sent: ");
  }

  // Another picture of the walk (not a decision: a plain GET of its fragment).
  function go(href, remember) {
    const url = new URL(href, location.href);
    const above = aboveBox();
    if (above) {
      url.searchParams.set("above", above.value);
    }
    exchange("/one-by-one/part" + url.search, {}, (text) => {
      marked = 0;
      place(text);
      if (remember) {
        history.pushState(null, "", url.pathname + url.search);
      }
      say("");
    }, "Not loaded: ");
  }

  function follow(which) {
    const link = slot.querySelector("a[data-go=" + which + "]");
    if (link) {
      go(link.href, true);
    }
  }

  function decide(action) {
    const li = suggestions()[marked];
    const form = li && li.querySelector('form[data-action="' + action + '"]');
    if (form) {
      send(form, form.querySelector("button"));
    }
  }

  slot.addEventListener("submit", (event) => {
    const form = event.target;
    event.preventDefault();
    if (form.method === "post") {
      send(form, event.submitter);
    } else {
      recount();
    }
  });
  slot.addEventListener("input", (event) => {
    if (event.target.name === "above") {
      recount();
    }
  });
  slot.addEventListener("click", (event) => {
    const link = event.target.closest("a[data-go]");
    if (link) {
      event.preventDefault();
      go(link.href, true);
    }
  });
  window.addEventListener("popstate", () => go(location.href, false));

  document.addEventListener("keydown", (event) => {
    if (event.ctrlKey || event.metaKey || event.altKey) {
      return;
    }
    const target = event.target;
    if (target && (target.isContentEditable || /^(INPUT|TEXTAREA|SELECT)$/.test(target.tagName))) {
      return;
    }
    switch (event.key) {
      case "j":
      case "ArrowRight":
        follow("next");
        break;
      case "k":
      case "ArrowLeft":
        follow("previous");
        break;
      case "ArrowDown":
        marked += 1;
        mark();
        break;
      case "ArrowUp":
        marked -= 1;
        mark();
        break;
      case "a":
        decide("accept");
        break;
      case "r":
        decide("reject");
        break;
      default:
        return;
    }
    event.preventDefault();
  });

  document.documentElement.dataset.keys = "on";
  mark();
})();
