/**
 * The sidebar's phase table and its words (src/format.ts).
 *
 * Started by tests/test_sidebar_words.py, which passes the Python library's phase sets in
 * JOBDESK_TEST_PHASES, so the two sides are checked against each other; the UWS 1.1 phases are
 * written here from the standard (§2.1.3). `npm test` alone skips the library comparison.
 */
import { describe, expect, it } from 'vitest';

import {
  ACTIVE,
  PHASE_FAMILY,
  PHASE_FILTERS,
  TERMINAL,
  phaseFamily,
  plural,
  timeWords
} from '../src/format';

interface IPhases {
  uws: string[];
  terminal: string[];
  active: string[];
  ours: string[];
}

const RAW = process.env.JOBDESK_TEST_PHASES ?? '';
const LIBRARY: IPhases = JSON.parse(RAW || '{}');

// UWS 1.1 (REC 2016-10-24) §2.1.3: the ten execution phases, and those final for a client.
const UWS_11 = [
  'PENDING', 'QUEUED', 'EXECUTING', 'COMPLETED', 'ERROR', 'ABORTED', 'UNKNOWN', 'HELD',
  'SUSPENDED', 'ARCHIVED'
];
const UWS_11_FINAL = ['COMPLETED', 'ERROR', 'ABORTED', 'ARCHIVED'];
// Ours: UNREACHED (the service was never reached, no job created) is covered before it lands.
const OURS = ['UNSENT', 'SUBMITTED', 'LOST', 'UNREACHED'];

const families = PHASE_FILTERS.filter(([label]) => label !== 'All phases' && label !== 'Active')
  .map(([, value]) => value.split(','));

describe('the phase table', () => {
  it('puts every phase in exactly one filter family', () => {
    for (const phase of [...UWS_11, ...OURS]) {
      expect(families.filter(f => f.includes(phase)).length, phase).toBe(1);
      expect(PHASE_FAMILY[phase], phase).toBeDefined();
    }
    expect(Object.keys(PHASE_FAMILY).sort()).toEqual([...UWS_11, ...OURS].sort());
    expect(phaseFamily('SOMETHING_NEW')).toBe('waiting');
  });

  it('ends jobs where UWS 1.1 does, and UNREACHED with the failed ones', () => {
    for (const phase of UWS_11_FINAL) {
      expect(TERMINAL.has(phase), phase).toBe(true);
    }
    expect(TERMINAL.has('UNREACHED')).toBe(true);
    expect(PHASE_FAMILY.UNREACHED).toBe('failed');
    expect(PHASE_FAMILY.ERROR).toBe('failed');
    expect(PHASE_FAMILY.ABORTED).not.toBe('failed');
    for (const phase of ACTIVE) {
      expect(TERMINAL.has(phase), phase).toBe(false);
    }
  });

  it.skipIf(!RAW)('agrees with the Python library', () => {
    expect([...LIBRARY.uws].sort()).toEqual([...UWS_11].sort());
    const terminal = [...TERMINAL].filter(p => p !== 'UNREACHED' || LIBRARY.ours.includes(p));
    expect(terminal.sort()).toEqual([...LIBRARY.terminal].sort());
    expect([...ACTIVE].sort()).toEqual([...LIBRARY.active].sort());
    for (const phase of LIBRARY.ours) {
      expect(PHASE_FAMILY[phase], phase).toBeDefined();
    }
  });
});

describe('the words', () => {
  const now = 1_800_000_000;
  const created = now - 90;
  const waiting = (phase: string) => timeWords({ phase, created, submitted: created + 30 }, now);

  it('says "queued" only of QUEUED jobs, and the truth of the others', () => {
    expect(waiting('QUEUED')).toBe('queued 1 min 00 s');
    expect(waiting('PENDING')).toBe('pending 1 min 00 s');
    expect(waiting('UNSENT')).toBe('not sent yet, 1 min 30 s');
    expect(waiting('SUBMITTED')).toBe('sent 1 min 00 s ago');
    expect(waiting('HELD')).toBe('held 1 min 00 s');
    expect(waiting('SUSPENDED')).toBe('suspended 1 min 00 s');
    expect(waiting('UNKNOWN')).toBe('phase unknown, 1 min 00 s');
    const queued = [...UWS_11, ...OURS].filter(p => !TERMINAL.has(p) && p !== 'EXECUTING')
      .map(waiting).filter(w => w.startsWith('queued'));
    expect(queued).toEqual(['queued 1 min 00 s']);
  });

  it('says how long a job ran, or that it ended before it started', () => {
    expect(timeWords({ phase: 'EXECUTING', created, started: created + 60 }, now))
      .toBe('running 30 s');
    expect(timeWords({ phase: 'COMPLETED', created, started: created + 1, finished: created + 3 },
      now)).toBe('ran 2 s');
    expect(timeWords({ phase: 'ERROR', created, finished: created + 5 }, now))
      .toBe('ended after 5 s');
  });

  it('says when the service does not answer, and uses the service clock when it gave one', () => {
    expect(timeWords({ phase: 'SUBMITTED', created, unreachable_since: now - 40, next_try: now + 5 },
      now)).toBe('service unreachable for 40 s, retrying (next try in 5 s)');
    expect(timeWords({ phase: 'UNREACHED', created, finished: now }, now))
      .toBe('never reached the service');
    expect(timeWords({ phase: 'ERROR', created, finished: now, service_started: created + 10,
      service_finished: created + 25 }, now)).toBe('ran 15 s (service clock)');
  });

  it('counts naturally', () => {
    expect(plural(1, 'result')).toBe('1 result');
    expect(plural(1200, 'result')).toBe('1,200 results');
  });
});
