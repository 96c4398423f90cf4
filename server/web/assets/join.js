// The join page: trades the code of an invite link for a token (POST
// /api/join), keeps the token in the tab's session storage and opens the
// page for the invite's role. The code travels in the URL's fragment, which
// browsers never send to a server; it is removed from the address bar and
// the history before anything else happens.
'use strict';

(() => {
  const form = document.getElementById('join-form');
  const input = document.getElementById('join-code');
  const progress = document.getElementById('join-progress');
  const errorBox = document.getElementById('join-error');
  const errorTitle = document.getElementById('join-error-title');
  const errorText = document.getElementById('join-error-text');

  const titles = {
    expired: 'This link has expired',
    used: 'This link was used already',
    unknown: 'This link is not valid',
    malformed: 'This is not a join code',
    rate_limited: 'Too many attempts',
  };

  function fail(code, message) {
    TM.show(progress, false);
    errorTitle.textContent = titles[code] || 'This link cannot be used';
    errorText.textContent = message;
    TM.show(errorBox, true);
    TM.show(form, true);
    input.focus();
  }

  async function join(code) {
    TM.show(errorBox, false);
    TM.show(progress, true);
    TM.show(form, false);
    let response;
    try {
      response = await fetch('/api/join', {
        method: 'POST',
        headers: { 'Content-Type': 'application/json' },
        body: JSON.stringify({ code }),
        cache: 'no-store',
        credentials: 'omit',
      });
    } catch (e) {
      fail('', 'The server cannot be reached. Check your connection and try again.');
      return;
    }
    let body = {};
    try { body = await response.json(); } catch (e) { /* not JSON */ }
    if (!response.ok) {
      fail(body.code || '', body.error || ('The server answered ' + response.status + '.'));
      return;
    }
    // A new grant replaces whatever this tab held before (another session or role).
    TM.store.remove('trainer');
    TM.store.remove('live');
    TM.store.set('grant', body);
    location.replace(body.page);
  }

  form.addEventListener('submit', (e) => {
    e.preventDefault();
    const code = input.value.trim();
    if (code) join(code);
  });

  // Takes the code out of the address bar and the history, then joins.
  function fromFragment() {
    const code = decodeURIComponent(location.hash.replace(/^#/, '')).replace(/^code=/, '');
    if (location.hash) history.replaceState(null, '', location.pathname);
    if (code) join(code);
    return code !== '';
  }
  // A second link opened in the same tab changes only the fragment.
  window.addEventListener('hashchange', fromFragment);
  if (!fromFragment()) TM.show(form, true);
})();
