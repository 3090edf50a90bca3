<?xml version="1.0" encoding="utf-8"?>
<!-- An invented catalogue for jobdesk's interoperability tests: every value comes from a
     pseudo-random generator with a fixed seed, so two imports give identical tables. -->
<resource schema="driftcat">
  <meta name="title">Invented drift-scan catalogue (jobdesk interop tests)</meta>
  <meta name="description">Synthetic positions, proper motions and magnitudes of 20000
    invented objects, generated with a fixed seed. Not a real survey.</meta>
  <meta name="creationDate">2024-01-01T00:00:00Z</meta>
  <meta name="subject">Synthetic data</meta>
  <meta name="creator.name">jobdesk test suite</meta>

  <table id="objects" onDisk="True" adql="True" primary="obj_id">
    <meta name="description">Invented objects of the drift-scan catalogue.</meta>
    <column name="obj_id" type="bigint" ucd="meta.id;meta.main" required="True"
      description="Running number of the invented object"/>
    <column name="label" type="text" ucd="meta.id"
      description="Invented designation, DRX- and the running number"/>
    <column name="ra" type="double precision" unit="deg" ucd="pos.eq.ra;meta.main"
      description="Right ascension (invented)"/>
    <column name="dec" type="double precision" unit="deg" ucd="pos.eq.dec;meta.main"
      description="Declination (invented)"/>
    <column name="pm_ra" type="real" unit="mas/yr" ucd="pos.pm;pos.eq.ra"
      description="Proper motion in RA times cos(dec) (invented)"/>
    <column name="pm_dec" type="real" unit="mas/yr" ucd="pos.pm;pos.eq.dec"
      description="Proper motion in Dec (invented)"/>
    <column name="mag_blue" type="real" unit="mag" ucd="phot.mag"
      description="Magnitude in the invented blue band"/>
    <column name="mag_red" type="real" unit="mag" ucd="phot.mag"
      description="Magnitude in the invented red band"/>
    <column name="quality" type="smallint" ucd="meta.code.qual" required="True"
      description="Invented quality flag, 0 (best) to 3"/>
  </table>

  <data id="import">
    <sources item="20240611"/>
    <embeddedGrammar>
      <iterator>
        <code>
          import math, random
          rng = random.Random(int(self.sourceToken))
          for n in range(1, 20001):
            ra = rng.uniform(150.0, 170.0)
            dec = math.degrees(math.asin(rng.uniform(math.sin(math.radians(-5.0)),
                                                     math.sin(math.radians(5.0)))))
            blue = round(rng.gauss(18.5, 1.6), 3)
            yield {
              "obj_id": n,
              "label": "DRX-%05d" % n,
              "ra": ra,
              "dec": dec,
              "pm_ra": round(rng.gauss(0.0, 6.0), 3),
              "pm_dec": round(rng.gauss(-2.0, 6.0), 3),
              "mag_blue": blue,
              "mag_red": round(blue - abs(rng.gauss(0.7, 0.3)), 3),
              "quality": rng.choice((0, 0, 0, 1, 1, 2, 3)),
            }
        </code>
      </iterator>
    </embeddedGrammar>
    <make table="objects">
      <!-- sleepy(x) returns x after a pause: the slow view below uses it so that jobs on it
           run for a predictable time, whatever the machine's speed. -->
      <script lang="SQL" type="postCreation" name="create sleepy function"><![CDATA[
        CREATE OR REPLACE FUNCTION driftcat.sleepy(x double precision)
        RETURNS double precision AS $$
        BEGIN
          PERFORM pg_sleep(0.25);
          RETURN x;
        END;
        $$ LANGUAGE plpgsql VOLATILE
      ]]></script>
    </make>
  </data>

  <table id="slow" onDisk="True" adql="True">
    <meta name="description">The first 400 invented objects, each row delayed 0.25 s
      when it is returned, for deterministic long-running jobs.</meta>
    <column original="objects.obj_id"/>
    <column original="objects.ra"/>
    <column original="objects.dec"/>
    <column name="mag_blue" type="real" unit="mag" ucd="phot.mag"
      description="Magnitude in the invented blue band, returned after a pause"/>
    <viewStatement>
      CREATE VIEW \qName (\colNames) AS (
        SELECT obj_id, ra, dec, driftcat.sleepy(mag_blue)::real FROM driftcat.objects
        WHERE obj_id &lt;= 400)
    </viewStatement>
  </table>

  <data id="make_slow">
    <make table="slow"/>
  </data>
</resource>
