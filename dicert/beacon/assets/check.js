/*
 * dicert beacon site: in-browser checks of the published chain.
 *
 * Plain JavaScript, no dependencies, nothing fetched from outside this site folder.
 *
 * What is checked (the same rules as dicert's record and chain modules):
 *   - manifest.json lists pulses 1..N in order;
 *   - each record file exists and its bytes hash (SHA-256) to the manifest's file_sha256;
 *   - each record file is the RFC 8785 canonical form of its JSON (plus an optional LF);
 *   - the record digest is SHA-256 of the canonical body, i.e. the record without its
 *     "record_sha256" and "signature" members; it must equal the record's record_sha256,
 *     the manifest's record_sha256 and the next pulse's previous_record_sha256 (null for 1);
 *   - the last digest equals the manifest's head_sha256 and the head shown on the page;
 *   - with a published operator key (operator-key.pub, PEM SubjectPublicKeyInfo): each
 *     record's signature.public_key is that key, key_fingerprint is SHA-256 of the raw key,
 *     and signature.value is a valid Ed25519 signature (RFC 8032) over the canonical body
 *     bytes, checked with WebCrypto where the browser supports Ed25519.
 * These checks are a convenience; `dicert verify --chain` with a trusted key is authoritative.
 */
(function () {
  'use strict';

  var SIG_ALGORITHM = 'Ed25519';
  var SEAL = { record_sha256: true, signature: true };
  // DER prefix of an Ed25519 SubjectPublicKeyInfo (RFC 8410 section 4): 12 bytes, then the key.
  var SPKI_PREFIX = [0x30, 0x2a, 0x30, 0x05, 0x06, 0x03, 0x2b, 0x65, 0x70, 0x03, 0x21, 0x00];
  var HEX64 = /^[0-9a-f]{64}$/;
  var HEX128 = /^[0-9a-f]{128}$/;

  function toHex(buf) {
    var b = new Uint8Array(buf), s = '';
    for (var i = 0; i < b.length; i++) s += (b[i] < 16 ? '0' : '') + b[i].toString(16);
    return s;
  }

  function fromHex(s) {
    var out = new Uint8Array(s.length / 2);
    for (var i = 0; i < out.length; i++) out[i] = parseInt(s.substr(2 * i, 2), 16);
    return out;
  }

  function sameBytes(a, b) {
    if (a.length !== b.length) return false;
    for (var i = 0; i < a.length; i++) if (a[i] !== b[i]) return false;
    return true;
  }

  // RFC 8785 (JCS): ECMAScript number and string serialisation, members sorted by UTF-16 code
  // units (the default Array.prototype.sort order), no whitespace. `skip` drops top-level members.
  function canon(v, skip) {
    if (v === null) return 'null';
    if (typeof v === 'boolean') return v ? 'true' : 'false';
    if (typeof v === 'number') {
      if (!isFinite(v)) throw new Error('non-finite number');
      return JSON.stringify(v);
    }
    if (typeof v === 'string') return JSON.stringify(v);
    if (Array.isArray(v)) return '[' + v.map(function (x) { return canon(x, null); }).join(',') + ']';
    var keys = Object.keys(v).sort(), parts = [];
    for (var i = 0; i < keys.length; i++) {
      if (skip && skip[keys[i]]) continue;
      parts.push(JSON.stringify(keys[i]) + ':' + canon(v[keys[i]], null));
    }
    return '{' + parts.join(',') + '}';
  }

  var enc = new TextEncoder();

  async function sha256Hex(bytes) {
    return toHex(await crypto.subtle.digest('SHA-256', bytes));
  }

  async function fetchBytes(url) {
    var r;
    try {
      r = await fetch(url, { cache: 'no-store', redirect: 'error', credentials: 'omit' });
    } catch (e) {
      throw new Error('cannot fetch ' + url);
    }
    if (!r.ok) throw new Error(url + ' is missing (HTTP ' + r.status + ')');
    return new Uint8Array(await r.arrayBuffer());
  }

  function parseJson(bytes, name) {
    var text;
    try {
      text = new TextDecoder('utf-8', { fatal: true }).decode(bytes);
    } catch (e) {
      throw new Error(name + ' is not UTF-8');
    }
    try {
      return JSON.parse(text);
    } catch (e) {
      throw new Error(name + ' is not valid JSON');
    }
  }

  function pemToDer(text) {
    var m = /-----BEGIN PUBLIC KEY-----([\s\S]*?)-----END PUBLIC KEY-----/.exec(text);
    if (!m) throw new Error('the operator key file is not a PEM public key');
    var bin = atob(m[1].replace(/\s+/g, ''));
    var der = new Uint8Array(bin.length);
    for (var i = 0; i < bin.length; i++) der[i] = bin.charCodeAt(i);
    if (der.length !== 44 || !sameBytes(der.subarray(0, 12), SPKI_PREFIX)) {
      throw new Error('the operator key file does not hold an Ed25519 public key');
    }
    return der;
  }

  // The published operator key: {state: 'none'|'ok'|'unsupported', key, rawHex, fingerprint}.
  async function loadKey(root, manifest) {
    var pk = manifest.public_key;
    if (pk === null || pk === undefined) return { state: 'none' };
    if (pk.algorithm !== SIG_ALGORITHM) throw new Error('manifest: unsupported key algorithm');
    var der = pemToDer(new TextDecoder().decode(await fetchBytes(root + '/' + pk.file)));
    var raw = der.subarray(12);
    var rawHex = toHex(raw);
    var fp = await sha256Hex(raw);
    if (rawHex !== pk.raw_hex) throw new Error('the operator key file differs from manifest.json');
    if (fp !== pk.key_fingerprint) throw new Error('manifest.json gives a wrong key fingerprint');
    var key = null;
    try {
      key = await crypto.subtle.importKey('spki', der, { name: SIG_ALGORITHM }, false, ['verify']);
    } catch (e) {
      return { state: 'unsupported', rawHex: rawHex, fingerprint: fp };
    }
    return { state: 'ok', key: key, rawHex: rawHex, fingerprint: fp };
  }

  async function checkSignature(record, body, op) {
    var s = record.signature;
    if (s === null || typeof s !== 'object') return 'the record is unsigned';
    if (s.algorithm !== SIG_ALGORITHM) return 'signature algorithm is not Ed25519';
    if (typeof s.public_key !== 'string' || !HEX64.test(s.public_key)) return 'malformed signature.public_key';
    if (s.public_key !== op.rawHex) {
      return 'signed by another key (fingerprint ' + (await sha256Hex(fromHex(s.public_key))).slice(0, 16) + '...)';
    }
    if (s.key_fingerprint !== op.fingerprint) return 'signature.key_fingerprint does not match the key';
    if (typeof s.value !== 'string' || !HEX128.test(s.value)) return 'malformed signature.value';
    var ok = await crypto.subtle.verify({ name: SIG_ALGORITHM }, op.key, fromHex(s.value), body);
    return ok ? null : 'Ed25519 signature does not verify';
  }

  // Check one pulse; returns {index, errors[], digest, selfOk, sig}.
  async function checkPulse(root, entry, op) {
    var res = { index: entry.index, errors: [], digest: null, selfOk: false, sig: 'not-checked', record: null };
    var bytes;
    try {
      bytes = await fetchBytes(root + '/' + entry.record_file);
    } catch (e) {
      res.errors.push('record file missing or unreadable: ' + e.message);
      return res;
    }
    if ((await sha256Hex(bytes)) !== entry.file_sha256) res.errors.push('file bytes differ from manifest.json');
    var record;
    try {
      record = parseJson(bytes, entry.record_file);
    } catch (e) {
      res.errors.push(e.message);
      return res;
    }
    if (record === null || typeof record !== 'object' || Array.isArray(record)) {
      res.errors.push('not a JSON object');
      return res;
    }
    res.record = record;
    var body;
    try {
      var whole = enc.encode(canon(record, null));
      var text = bytes[bytes.length - 1] === 10 ? bytes.subarray(0, bytes.length - 1) : bytes;
      if (!sameBytes(whole, text)) res.errors.push('file is not in canonical form (RFC 8785)');
      body = enc.encode(canon(record, SEAL));
    } catch (e) {
      res.errors.push('record has no canonical form (' + e.message + ')');
      return res;
    }
    var digest = await sha256Hex(body);
    res.digest = digest;
    if (record.record_sha256 !== digest) {
      res.errors.push('record_sha256 does not match the body (altered after sealing)');
    } else {
      res.selfOk = true;
    }
    if (digest !== entry.record_sha256) res.errors.push('digest differs from manifest.json');
    if (record.pulse_index !== entry.index) res.errors.push('pulse_index in the record is ' + record.pulse_index);
    if (op.state === 'ok') {
      var why = await checkSignature(record, body, op);
      res.sig = why ? 'invalid' : 'valid';
      if (why) res.errors.push(why);
    } else if (op.state === 'unsupported') {
      res.sig = 'unavailable';
    }
    return res;
  }

  function setState(el, state, text) {
    if (!el) return;
    el.setAttribute('data-state', state);
    el.textContent = text;
  }

  function pulseText(p, op) {
    if (p.errors.length) return 'INVALID: ' + p.errors.join('; ');
    if (p.sig === 'valid') return 'valid: hash chain and signature';
    if (p.sig === 'unavailable') return 'hash chain valid; signature check unavailable in this browser';
    if (op.state === 'none') return 'hash chain valid; signature not checked (no operator key published)';
    return 'hash chain valid';
  }

  function pulseState(p) {
    if (p.errors.length) return 'invalid';
    return p.sig === 'valid' ? 'valid' : 'partial';
  }

  async function run() {
    var root = document.body.getAttribute('data-root') || '.';
    var result = document.getElementById('chain-result');
    var details = document.getElementById('check-details');
    var panel = document.getElementById('check');
    function detail(text) {
      var li = document.createElement('li');
      li.textContent = text;
      details.appendChild(li);
    }
    function finish(state, text) {
      setState(result, state, text);
      if (panel) panel.setAttribute('data-state', state);
      document.body.setAttribute('data-check', state);
    }
    if (!window.crypto || !crypto.subtle) {
      finish('unavailable', 'Check unavailable: this browser offers WebCrypto only on pages served over HTTPS ' +
        '(or from localhost). Use dicert verify --chain instead.');
      return;
    }
    setState(result, 'pending', 'Checking...');
    var manifest, op;
    try {
      manifest = parseJson(await fetchBytes(root + '/manifest.json'), 'manifest.json');
      op = await loadKey(root, manifest);
    } catch (e) {
      finish('invalid', 'INVALID: ' + e.message);
      return;
    }
    var chainErrors = [];
    var entries = Array.isArray(manifest.pulses) ? manifest.pulses : [];
    if (!entries.length) chainErrors.push('manifest.json lists no pulses');
    var results = [];
    for (var i = 0; i < entries.length; i++) {
      var entry = entries[i];
      if (entry.index !== i + 1) {
        chainErrors.push(i === 0 ? 'the chain does not start at pulse 1'
          : 'pulse ' + (entries[i - 1].index + 1) + ' is missing (manifest jumps to pulse ' + entry.index + ')');
      }
      results.push(await checkPulse(root, entry, op));
    }
    // Links: each pulse names the digest of the one before (null for the first).
    for (i = 0; i < results.length; i++) {
      var r = results[i];
      if (!r.record) continue;
      var prev = r.record.previous_record_sha256;
      if (entries[i].previous_record_sha256 !== prev) r.errors.push('previous_record_sha256 differs from manifest.json');
      if (r.index === 1) {
        if (prev !== null) r.errors.push('the first pulse must have previous_record_sha256 null');
      } else if (i > 0 && results[i - 1].selfOk && results[i - 1].index === r.index - 1) {
        if (prev !== results[i - 1].digest) r.errors.push('previous_record_sha256 does not match pulse ' + (r.index - 1));
      } else if (i > 0 && !results[i - 1].record) {
        // the predecessor is missing or unreadable; it is reported there
      } else if (i > 0 && results[i - 1].index !== r.index - 1) {
        r.errors.push('does not link to a published pulse ' + (r.index - 1));
      }
    }
    var last = results.length ? results[results.length - 1] : null;
    var head = manifest.chain && manifest.chain.head_sha256;
    if (!last || last.digest !== head) chainErrors.push('the head digest in manifest.json is not the last pulse\'s digest');
    var shownHead = document.getElementById('head-digest');
    if (shownHead && shownHead.textContent.trim() !== head) chainErrors.push('the head digest shown on this page differs from manifest.json');
    // The rows of this page must be the pulses checked, with the digests checked.
    var byIndex = {};
    results.forEach(function (p) { byIndex[p.index] = p; });
    document.querySelectorAll('tr[data-index]').forEach(function (row) {
      var idx = parseInt(row.getAttribute('data-index'), 10);
      var p = byIndex[idx];
      if (!p) chainErrors.push('this page lists pulse ' + idx + ', which manifest.json does not hold');
      else if (p.digest !== null && row.getAttribute('data-record-sha256') !== p.digest) {
        p.errors.push('this page shows a different record digest');
      }
    });
    var invalid = results.filter(function (p) { return p.errors.length; });
    results.forEach(function (p) {
      var cell = document.querySelector('[data-result-for="' + p.index + '"]');
      setState(cell, pulseState(p), pulseText(p, op));
    });
    var pagePulse = document.body.getAttribute('data-pulse');
    if (pagePulse !== null) {
      var mine = byIndex[parseInt(pagePulse, 10)];
      setState(document.getElementById('pulse-result'), mine ? pulseState(mine) : 'invalid',
        'Pulse ' + pagePulse + ': ' + (mine ? pulseText(mine, op) : 'INVALID: not in manifest.json'));
    }
    chainErrors.forEach(function (t) { detail('chain: ' + t); });
    invalid.forEach(function (p) { detail('pulse ' + p.index + ': ' + p.errors.join('; ')); });
    window.dicertComputedHead = (!chainErrors.length && !invalid.length && last) ? last.digest : null;
    var n = results.length;
    if (chainErrors.length || invalid.length) {
      var names = invalid.map(function (p) { return 'pulse ' + p.index; });
      finish('invalid', 'INVALID: ' + chainErrors.concat(invalid.map(function (p) {
        return 'pulse ' + p.index + ': ' + p.errors[0];
      })).join('; ') + (names.length ? ' [invalid: ' + names.join(', ') + ']' : ''));
    } else if (op.state === 'ok') {
      finish('valid', 'VALID: all ' + n + ' pulses: hash chain intact up to the head digest, and every ' +
        'Ed25519 signature verifies under the published operator key (fingerprint ' + op.fingerprint + ').');
    } else if (op.state === 'unsupported') {
      finish('partial', 'HASH CHAIN VALID (' + n + ' pulses, head digest matches). Signature check ' +
        'unavailable in this browser (no Ed25519 in its WebCrypto); use dicert verify --chain.');
    } else {
      finish('partial', 'HASH CHAIN VALID (' + n + ' pulses, head digest matches). Signatures not ' +
        'checked: no operator key was published with this site.');
    }
    compareHead();
  }

  function compareHead() {
    var input = document.getElementById('expected-head');
    var out = document.getElementById('compare-result');
    if (!input || !out) return;
    var want = input.value.trim().toLowerCase();
    if (!want) {
      setState(out, 'none', '');
      return;
    }
    if (!HEX64.test(want)) {
      setState(out, 'invalid', 'not a SHA-256 digest (64 hex digits)');
    } else if (!window.dicertComputedHead) {
      setState(out, 'invalid', 'the chain did not check out, so there is no head to compare');
    } else if (want === window.dicertComputedHead) {
      setState(out, 'valid', 'matches the head of the checked chain');
    } else {
      setState(out, 'invalid', 'DOES NOT MATCH the head of this chain (pulses missing, added or altered)');
    }
  }

  // The primitives the checks use, exposed read-only so they can be tested against published
  // vectors (RFC 8785, RFC 8032) in a browser.
  window.dicertSite = Object.freeze({
    canonicalize: function (value) { return canon(value, null); },
    verifyEd25519: async function (publicKeyHex, messageHex, signatureHex) {
      var der = new Uint8Array(44);
      der.set(SPKI_PREFIX, 0);
      der.set(fromHex(publicKeyHex), 12);
      var key;
      try {
        key = await crypto.subtle.importKey('spki', der, { name: SIG_ALGORITHM }, false, ['verify']);
      } catch (e) {
        return 'unsupported';
      }
      return crypto.subtle.verify({ name: SIG_ALGORITHM }, key, fromHex(signatureHex), fromHex(messageHex));
    }
  });

  // A head digest obtained elsewhere can be given in the address: page.html#head=<64 hex>.
  function headFromAddress() {
    var input = document.getElementById('expected-head');
    var m = /(?:^#|&)head=([0-9a-fA-F]{64})/.exec(window.location.hash);
    if (m && input) input.value = m[1];
  }

  window.addEventListener('hashchange', function () {
    headFromAddress();
    compareHead();
  });

  document.addEventListener('DOMContentLoaded', function () {
    var form = document.getElementById('compare');
    headFromAddress();
    if (form) {
      form.addEventListener('submit', function (ev) {
        ev.preventDefault();
        compareHead();
      });
    }
    run().catch(function (e) {
      var result = document.getElementById('chain-result');
      setState(result, 'invalid', 'INVALID: the check stopped: ' + e.message);
      document.body.setAttribute('data-check', 'invalid');
    });
  });
})();
